#!/usr/bin/env bash
# Runs every fuzz target (cargo-fuzz, nightly toolchain) for RUNS executions each (default
# 1,000,000), starting from the seed corpus in fuzz/seeds/ (kept read-only: new inputs go
# to fuzz/corpus/). Prints each target's execution count; crashes land in fuzz/artifacts/.
#   bash scripts/fuzz.sh [RUNS] [TARGET...]
set -euo pipefail
cd "$(dirname "$0")/.."
RUNS="${1:-1000000}"
shift || true
TARGETS=("$@")
if [ ${#TARGETS[@]} -eq 0 ]; then TARGETS=(model_file kernel_expr csv npy onnx); fi
command -v cargo-fuzz >/dev/null || cargo install cargo-fuzz
for t in "${TARGETS[@]}"; do
  mkdir -p "fuzz/corpus/$t"
  echo "== $t: $RUNS runs" >&2
  cargo +nightly fuzz run "$t" "fuzz/corpus/$t" "fuzz/seeds/$t" -- -runs="$RUNS" -max_len=65536 -rss_limit_mb=2048 2>&1 \
    | grep -E "^#[0-9]+.*(DONE|pulse)|Done [0-9]+ runs|ERROR|panicked|SUMMARY" | tail -3
done

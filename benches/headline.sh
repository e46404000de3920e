#!/usr/bin/env bash
# The headline speed figures in one run: builds the `headline` example (release) and runs
# it, writing one JSON object (see examples/headline.rs for what each key measures).
# Installs Debian's dataset-fashion-mnist when it is missing (apt-get, as root or through
# sudo). With the Python reference environment of scripts/test.sh, also times the
# Hadamard model's ONNX export in onnxruntime (onnx_vs_native_batch, onnx_vs_native_single).
# It also trains (once, then cached) the 60,000-image teacher and measures it beside its
# Hadamard 4,096 model (fmnist60k).
# About four minutes on a 2-core machine once the big teacher is cached (its first training
# adds three to six).
#
# Usage: bash benches/headline.sh --out FILE.json
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=target/headline.json
while [ $# -gt 0 ]; do
  case "$1" in
    --out) OUT="$2"; shift 2 ;;
    *) echo "usage: bash benches/headline.sh --out FILE.json" >&2; exit 2 ;;
  esac
done
if [ ! -f /usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz ]; then
  echo "installing Debian's dataset-fashion-mnist" >&2
  SUDO=""
  if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq dataset-fashion-mnist >/dev/null
fi
cargo build --release --quiet --example headline
case "$OUT" in /*) ABS="$OUT" ;; *) ABS="$PWD/$OUT" ;; esac
./target/release/examples/headline "$ABS"
# The Hadamard model as ONNX in onnxruntime, beside score's f32 figures (the Python
# reference environment of scripts/test.sh; skipped, and said so, when it is missing).
PY=target/pyenv/bin/python
if [ -x "$PY" ] && "$PY" -c "import onnxruntime" 2>/dev/null; then
  "$PY" benches/onnx_time.py "$ABS"
else
  echo "onnxruntime not found (run bash scripts/test.sh once): onnx_vs_native_* not measured" >&2
fi

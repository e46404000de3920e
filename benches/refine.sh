#!/usr/bin/env bash
# Refinement on Fashion-MNIST in one run: builds the `fashion_refine` example (release) and
# runs it, writing one JSON object (see examples/fashion_refine.rs for what each key
# measures): per method, test-image agreement with the teacher before and after
# refinement, decision RMSE, refinement seconds and f32 single-row latency. Installs
# Debian's dataset-fashion-mnist when it is missing (apt-get, as root or through sudo).
# About 15 minutes on a 2-core machine with the default runs (the Hadamard run also guards
# both models at agreement 0.995 and measures their mean speedup). KP_FASHION_TEACHER=60000
# uses the 60,000-image teacher calibrated on its own training images.
#
# Usage: bash benches/refine.sh [--out FILE.json] [--runs method:features:passes[:rate[:P]],...]
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=target/fashion/refine.json
RUNS="nystrom:1024:48:0.004,hadamard:4096:12:0.01:0.995"
while [ $# -gt 0 ]; do
  case "$1" in
    --out) OUT="$2"; shift 2 ;;
    --runs) RUNS="$2"; shift 2 ;;
    *) echo "usage: bash benches/refine.sh [--out FILE.json] [--runs method:features:passes[:rate[:P]],...]" >&2; exit 2 ;;
  esac
done
if [ ! -f /usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz ]; then
  echo "installing Debian's dataset-fashion-mnist" >&2
  SUDO=""
  if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq dataset-fashion-mnist >/dev/null
fi
cargo build --release --quiet --example fashion_refine
mkdir -p target/fashion
case "$OUT" in /*) ABS="$OUT" ;; *) ABS="$PWD/$OUT" ;; esac
./target/release/examples/fashion_refine "$ABS" "$RUNS"

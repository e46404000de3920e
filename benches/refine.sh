#!/usr/bin/env bash
# Refinement on Fashion-MNIST in one run: builds the `fashion_refine` example (release) and
# runs it, writing one JSON object (see examples/fashion_refine.rs for what each key
# measures): per method, test-image agreement with the teacher before and after
# refinement, decision RMSE, refinement seconds and f32 single-row latency. Installs
# Debian's dataset-fashion-mnist when it is missing (apt-get, as root or through sudo).
# About 13 minutes on a 2-core machine with the default runs.
#
# Usage: bash benches/refine.sh [--out FILE.json] [--runs method:features:passes,...]
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=target/fashion/refine.json
RUNS="nystrom:1024:40,hadamard:4096:12"
while [ $# -gt 0 ]; do
  case "$1" in
    --out) OUT="$2"; shift 2 ;;
    --runs) RUNS="$2"; shift 2 ;;
    *) echo "usage: bash benches/refine.sh [--out FILE.json] [--runs method:features:passes,...]" >&2; exit 2 ;;
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

#!/usr/bin/env bash
# The whole test suite, set-up included: a Python reference environment under
# target/pyenv (numpy, scipy, the safetensors package), then the Rust tests, which call the
# reference scripts in tests/reference/. Safe to rerun; the environment is reused.
set -euo pipefail
cd "$(dirname "$0")/.."
PYENV=target/pyenv
REQS="numpy scipy safetensors onnx onnxruntime"
if [ ! -x "$PYENV/bin/python" ] || ! "$PYENV/bin/python" -c "import numpy, scipy, safetensors, onnx, onnxruntime" 2>/dev/null; then
  echo "setting up the Python reference environment in $PYENV" >&2
  mkdir -p target
  python3 -m venv "$PYENV"
  "$PYENV/bin/pip" install --quiet --disable-pip-version-check $REQS
fi
export KP_PYTHON="$PWD/$PYENV/bin/python"
cargo test --lib --bins --tests --examples "$@"
cargo test --doc "$@"
# Benches are compiled (not run: speed claims live in benchmarks, not in tests).
cargo bench --no-run --quiet

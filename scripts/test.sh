#!/usr/bin/env bash
# The whole test suite, set-up included: a Python reference environment under
# target/pyenv (numpy, scipy, the safetensors package, onnx, onnxruntime; maturin, pytest
# and Dask's distributed for the Python package) and Debian's chromium (installed with
# apt-get when missing), then the Rust tests, which call the reference scripts in
# tests/reference/ and the browser, then the Python package's tests (pytest, after
# `maturin develop` builds the package into target/pyenv). Safe to rerun; the environment
# is reused.
set -euo pipefail
cd "$(dirname "$0")/.."
PYENV=target/pyenv
REQS="numpy scipy safetensors onnx onnxruntime maturin pytest distributed"
if [ ! -x "$PYENV/bin/python" ] || ! "$PYENV/bin/python" -c "import numpy, scipy, safetensors, onnx, onnxruntime, maturin, pytest, distributed" 2>/dev/null; then
  echo "setting up the Python reference environment in $PYENV" >&2
  mkdir -p target
  python3 -m venv "$PYENV"
  "$PYENV/bin/pip" install --quiet --disable-pip-version-check $REQS
fi
# Debian's chromium renders the sweep page in a browser test (tests/choose.rs).
if ! command -v chromium >/dev/null 2>&1; then
  echo "installing Debian's chromium for the browser test" >&2
  SUDO=""
  if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq chromium >/dev/null
fi
export KP_PYTHON="$PWD/$PYENV/bin/python"
cargo test --lib --bins --tests --examples "$@"
cargo test --doc "$@"
# Benches are compiled (not run: speed claims live in benchmarks, not in tests), in the
# dev profile whose dependencies the tests above compiled: a release build of everything
# again took minutes of the suite on 2 cores. `cargo bench` builds them optimised.
cargo build --benches --quiet
# The Python package: built into the reference environment (the dev profile, whose
# dependencies the tests above compiled), then its tests, which compare it with the binary
# the tests above built and run a Dask cluster of two local processes.
VIRTUAL_ENV="$PWD/$PYENV" "$PYENV/bin/maturin" develop --quiet
KP_BIN="$PWD/target/debug/kernelpress" "$PYENV/bin/python" -m pytest -q python/tests

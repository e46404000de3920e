"""Shared fixtures: the repository's demo files and the command-line binary (`KP_BIN`, set
by the project's test command; else the release build)."""

import os
import pathlib
import subprocess

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def root():
    return ROOT


@pytest.fixture(scope="session")
def cli():
    exe = os.environ.get("KP_BIN", str(ROOT / "target" / "release" / "kernelpress"))
    if not os.path.exists(exe):
        pytest.fail(f"the kernelpress binary is missing at {exe}: run `bash scripts/test.sh`")

    def run(*args, check=True):
        p = subprocess.run([exe, *map(str, args)], capture_output=True, text=True)
        if check and p.returncode != 0:
            raise AssertionError(f"kernelpress {args} failed ({p.returncode}): {p.stderr}")
        return p

    return run


@pytest.fixture(scope="session")
def exact():
    import kernelpress as kp

    return kp.ExactModel.load(ROOT / "models" / "pump_svm.safetensors")


@pytest.fixture(scope="session")
def test_rows():
    import kernelpress as kp

    x, cols, y = kp.read_data(ROOT / "models" / "pump_test.csv", target="condition")
    return x, cols, y

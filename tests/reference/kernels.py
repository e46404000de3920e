"""Compares kernelpress Gram blocks with numpy/scipy. Usage: kernels.py CASES.json
CASES.json: {"a": "A.npy", "b": "B.npy", "cases": [{"spec": {...}, "gram": "G.npy", "expr": "..."}]}"""
import json
import sys

import numpy as np

from kp_ref import gram

cfg = json.load(open(sys.argv[1]))
a = np.load(cfg["a"])
b = np.load(cfg["b"])
worst = 0.0
fail = False
for c in cfg["cases"]:
    want = gram(c["spec"], a, b)
    got = np.load(c["gram"])
    err = np.max(np.abs(want - got) / np.maximum(1.0, np.abs(want)))
    worst = max(worst, err)
    status = "ok" if err < 1e-9 else "MISMATCH"
    fail |= err >= 1e-9
    print(f"{status} {c['expr']}: max rel err {err:.3e}")
print(f"worst {worst:.3e}")
sys.exit(1 if fail else 0)

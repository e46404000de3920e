"""Fast Walsh–Hadamard transform against scipy.linalg.hadamard (Sylvester order) @ x.
Usage: wht.py DIR (files xN.npy, yN.npy)"""
import glob
import sys

import numpy as np
from scipy.linalg import hadamard

worst = 0.0
for f in glob.glob(sys.argv[1] + "/x*.npy"):
    x = np.load(f)
    y = np.load(f.replace("/x", "/y"))
    h = hadamard(len(x))
    err = np.max(np.abs(h @ x - y))
    worst = max(worst, err)
    assert np.allclose(h @ h, len(x) * np.eye(len(x)))
print(f"max abs err {worst:.3e}")
sys.exit(0 if worst < 1e-10 else 1)

"""Z·Zᵀ from `kernelpress featurize` output (numpy) against the exact Gram matrix (scipy).
Usage: featurize_gram.py DATA.csv SPEC_JSON Z.npy TOL"""
import json
import sys

import numpy as np

from kp_ref import gram, read_csv

x, _, _ = read_csv(sys.argv[1])
spec = json.loads(sys.argv[2])
z = np.load(sys.argv[3])
tol = float(sys.argv[4])
k = gram(spec, x, x)
err = np.linalg.norm(z @ z.T - k) / np.linalg.norm(k)
print(f"{spec['name']}: D={z.shape[1]} relative Frobenius error {err:.4e}")
sys.exit(0 if err < tol else 1)

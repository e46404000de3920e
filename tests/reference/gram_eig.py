"""Checks kernel-check's JSON against numpy.linalg.eigvalsh of a Gram matrix built here.
Usage: gram_eig.py POINTS.csv SPEC.json CHECK.json"""
import json
import sys

import numpy as np

from kp_ref import gram, read_csv

x, _, _ = read_csv(sys.argv[1])
spec = json.loads(sys.argv[2]) if sys.argv[2].startswith("{") else json.load(open(sys.argv[2]))
got = json.load(open(sys.argv[3]))
k = gram(spec, x, x)
ev = np.linalg.eigvalsh((k + k.T) / 2)
scale = np.max(np.abs(ev))
tol = 10 * len(ev) * np.finfo(float).eps * scale
neg = int(np.sum(ev < -tol))
print(f"numpy: min {ev[0]:.10e} max {ev[-1]:.10e} negative {neg}")
print(f"kernelpress: min {got['min_eigenvalue']:.10e} max {got['max_eigenvalue']:.10e} negative {got['negative_count']}")
ok = abs(ev[0] - got["min_eigenvalue"]) < 1e-9 * max(1.0, scale)
ok &= abs(ev[-1] - got["max_eigenvalue"]) < 1e-9 * max(1.0, scale)
ok &= neg == got["negative_count"]
ok &= (neg == 0) == got["psd"]
sys.exit(0 if ok else 1)

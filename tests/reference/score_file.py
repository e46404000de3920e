"""Recomputes an exact model's decision values and labels from its file (read with the
safetensors package) and compares them with `kernelpress score`.
Usage: score_file.py MODEL DATA.csv TARGET SCORE.csv"""
import sys

import numpy as np

from kp_ref import exact_decision, labels_from_decision, read_csv, read_score

model, data, target, score = sys.argv[1:5]
x, _, _ = read_csv(data, target)
s_ref, man = exact_decision(model, x)
s_got, lab = read_score(score)
err = np.max(np.abs(s_ref - s_got)) / max(1.0, np.max(np.abs(s_ref)))
lab_ref = labels_from_decision(man["output"]["task"], man["output"]["labels"], s_ref)
agree = np.mean([p == q for p, q in zip(lab_ref, lab)]) if lab_ref else 1.0
print(f"decision rel err {err:.3e}; label agreement {agree:.6f}; kind {man['kind']}")
sys.exit(0 if (err < 1e-9 and agree == 1.0) else 1)

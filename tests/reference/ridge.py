"""Kernel ridge: coefficients against numpy.linalg.solve on the same Gram matrix, and the
decision function recomputed from the model file (safetensors package) against `score`.
Usage: ridge.py MODEL TRAIN.csv TARGET RIDGE TEST.csv SCORE.csv"""
import sys

import numpy as np

from kp_ref import exact_decision, gram, load_model, read_csv, read_score, spec_from_expression

model, train, target, lam, test, score = sys.argv[1:7]
lam = float(lam)
t, man = load_model(model)
x, y, _ = read_csv(train, target)
if man["input"]["scaling"] == "standardize":
    mu, sd = x.mean(axis=0), x.std(axis=0)
    sd[sd < 1e-12] = 1.0
    x = (x - mu) / sd
    assert np.allclose(mu, t["input.mean"]) and np.allclose(sd, t["input.scale"])
k = gram(spec_from_expression(man["kernel"]), x, x)
if man["output"]["task"] == "regression":
    Y = np.array([float(v) for v in y])[:, None]
else:
    labels = man["output"]["labels"]
    if man["output"]["task"] == "binary":
        Y = np.array([[1.0 if v == labels[1] else -1.0] for v in y])
    else:
        Y = np.array([[1.0 if v == l else -1.0 for l in labels] for v in y])
mean = Y.mean(axis=0)
alpha = np.linalg.solve(k + lam * np.eye(len(x)), Y - mean)
err_c = np.max(np.abs(alpha - t["exact.coefficients"])) / max(1.0, np.max(np.abs(alpha)))
err_b = np.max(np.abs(mean - t["exact.intercepts"]))
xt, _, _ = read_csv(test, target)
s_ref, _ = exact_decision(model, xt)
s_got, lab = read_score(score)
err_s = np.max(np.abs(s_ref - s_got)) / max(1.0, np.max(np.abs(s_ref)))
print(f"coef rel err {err_c:.3e}, intercept err {err_b:.3e}, decision rel err {err_s:.3e}")
sys.exit(0 if (err_c < 1e-6 and err_b < 1e-12 and err_s < 1e-9) else 1)

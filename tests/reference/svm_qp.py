"""C-SVM dual solved independently with scipy.optimize (SLSQP), compared with the decision
values kernelpress's SMO model gives on test points.
Dual (Platt 1998; Fan, Chen & Lin 2005): min ½ aᵀQa − eᵀa, 0 ≤ a ≤ C, yᵀa = 0.
Usage: svm_qp.py TRAIN.csv TARGET POSITIVE_LABEL GAMMA C TEST.csv SCORE.csv"""
import sys

import numpy as np
from scipy.optimize import minimize

from kp_ref import gram, read_csv, read_score

train, target, pos, gam, C, test, score = sys.argv[1:8]
gam, C = float(gam), float(C)
x, y, _ = read_csv(train, target)
yy = np.array([1.0 if v == pos else -1.0 for v in y])
K = gram({"name": "gaussian", "gamma": gam}, x, x)
Q = (yy[:, None] * yy[None, :]) * K
n = len(yy)
res = minimize(
    lambda a: 0.5 * a @ Q @ a - a.sum(),
    np.zeros(n),
    jac=lambda a: Q @ a - 1.0,
    bounds=[(0.0, C)] * n,
    constraints=[{"type": "eq", "fun": lambda a: yy @ a, "jac": lambda a: yy}],
    method="SLSQP",
    options={"ftol": 1e-14, "maxiter": 2000},
)
a = np.clip(res.x, 0, C)
grad = Q @ a - 1.0
free = (a > 1e-6 * C) & (a < C * (1 - 1e-6))
# b from free vectors: y_t f(x_t) = 1  ⇒  b = y_t − Σ a_i y_i K_it
b = np.mean(yy[free] - (a * yy) @ K[:, free]) if free.any() else 0.0
xt, _, _ = read_csv(test, target)
s_ref = gram({"name": "gaussian", "gamma": gam}, xt, x) @ (a * yy) + b
s_got, _ = read_score(score)
err = np.max(np.abs(s_ref - s_got[:, 0]))
scale = np.max(np.abs(s_ref))
print(f"SLSQP success={res.success} nfree={free.sum()} dual={res.fun:.8f}; max |Δdecision| {err:.3e} (scale {scale:.3f})")
sys.exit(0 if err < 5e-3 * max(1.0, scale) else 1)

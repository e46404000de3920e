"""A compiled model's decision values recomputed from its file (safetensors package +
numpy) against `kernelpress score`, and every report number recomputed in numpy from the
`score` outputs of the exact and the compiled model.
Usage: compiled_check.py COMPILED DATA.csv TARGET SCORE_COMPILED.csv SCORE_EXACT.csv REPORT.json"""
import json
import sys

import numpy as np

from kp_ref import compiled_decision, labels_from_decision, read_csv, read_score

model, data, target, sc_path, se_path, rep_path = sys.argv[1:7]
x, y, _ = read_csv(data, target)
s_ref, man = compiled_decision(model, x)
sc, lc = read_score(sc_path)
se, le = read_score(se_path)
err = np.max(np.abs(s_ref - sc)) / max(1.0, np.max(np.abs(s_ref)))
lab_ref = labels_from_decision(man["output"]["task"], man["output"]["labels"], s_ref)
print(f"compiled decision rel err vs numpy {err:.3e}")
ok = err < 1e-9 and lab_ref == lc
rep = json.load(open(rep_path))
n = len(x)
agree = np.mean([a == b for a, b in zip(lc, le)])
diff = se - sc
rmse = np.sqrt(np.mean(diff**2))
r2 = 1 - np.sum(diff**2) / np.sum((se - se.mean()) ** 2)
mx = np.max(np.abs(diff))
acc_e = np.mean([a == b for a, b in zip(le, y)])
acc_c = np.mean([a == b for a, b in zip(lc, y)])
# Wilson 95% interval (Wilson 1927).
z = 1.959963984540054
p = agree
den = 1 + z * z / n
centre = (p + z * z / (2 * n)) / den
half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
checks = {
    "agreement": (agree, rep["agreement"]),
    "decision_rmse": (rmse, rep["decision_rmse"]),
    "decision_r2": (r2, rep["decision_r2"]),
    "decision_max_abs_error": (mx, rep["decision_max_abs_error"]),
    "accuracy_exact": (acc_e, rep["accuracy_exact"]),
    "accuracy_compiled": (acc_c, rep["accuracy_compiled"]),
    "agreement_ci95_lo": (centre - half, rep["agreement_ci95"][0]),
    "agreement_ci95_hi": (centre + half, rep["agreement_ci95"][1]),
    "n_rows": (n, rep["n_rows"]),
}
for k, (want, got) in checks.items():
    good = abs(want - got) <= 1e-9 * max(1.0, abs(want))
    ok &= good
    print(f"{'ok' if good else 'MISMATCH'} {k}: numpy {want} report {got}")
sys.exit(0 if ok else 1)

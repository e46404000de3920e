"""A guarded model's exports checked outside the project: the ONNX graph by the onnx
package (check_model with full_check) and onnxruntime, the safetensors weights export by
numpy, which applies the guard as the README's "Guarded models" section describes it (the
compiled stage by the README scorer, the exact fallback as a kernel expansion over
exact.support_vectors, the rule and threshold of the `guard` section). Both are compared
with `kernelpress score` of the guarded model file: the same label on every row, the same
stage on every row, decisions within f32 rounding (1e-4 of the decision scale plus the f32
bound of the exact expansion, 64·2⁻²⁴·Σ|k_i·c_i|). The ONNX metadata must name the input
columns in the data's order.
Usage: guarded_check.py MODEL.onnx WEIGHTS.safetensors DATA.csv TARGET SCORE.csv"""
import csv
import sys

import numpy as np
import onnx
import onnxruntime as ort

import score_from_format_page as sr

onnx_path, weights, data, target, score = sys.argv[1:6]
m = onnx.load(onnx_path)
onnx.checker.check_model(m, full_check=True)
meta = {p.key: p.value for p in m.metadata_props}
with open(data) as f:
    rows = list(csv.reader(f))
head = rows[0]
cols = [j for j in range(len(head)) if head[j] != target]
assert meta["input_columns"] == ",".join(head[j] for j in cols), meta["input_columns"]
assert "guard" in meta, sorted(meta)
x = np.array([[float(r[j]) for j in cols] for r in rows[1:]])

# --- numpy, from the weights export and the README -----------------------------------------
t, man = sr.load(weights)
assert man["kind"] == "guarded-weights", man["kind"]
t = {k: v.astype(np.float64) for k, v in t.items()}
xs = (x - t["input.mean"]) / t["input.scale"] if man["input"]["scaling"] == "standardize" else x
vals = [xs]
for i, st in enumerate(man["program"]["steps"]):
    vals.append(sr.run_step(st, [vals[j] for j in st["inputs"]], t, i))
sc = vals[man["program"]["output"]] @ t["head.weights"] + t["head.bias"]
kx = sr.kernel_matrix(sr.parse_kernel(man["kernel"]), xs, t["exact.support_vectors"])
se = kx @ t["exact.coefficients"] + t["exact.intercepts"]
bound = 64 * 2.0**-24 * (np.abs(kx) @ np.abs(t["exact.coefficients"])).max()
g = man["guard"]
tau = float(g["threshold"])  # a number, or the strings "inf" / "-inf"
task = man["output"]["task"]
names = man["output"]["labels"]
c = len(names)


def label_index(row):
    if task == "binary":
        return int(row[0] > 0)
    if task == "ovr":
        return int(np.argmax(row))
    votes = np.zeros(c, dtype=int)
    p = 0
    for i in range(c):
        for j in range(i + 1, c):
            votes[i if row[p] > 0 else j] += 1
            p += 1
    return int(np.argmax(votes))


def plan(row):
    """Outputs the exact model recomputes (README, "Guarded models")."""
    k = len(row)
    if g["rule"].startswith("smallest margin"):
        b = label_index(row)
        if task == "binary":
            conf = abs(row[0])
        elif task == "ovr":
            conf = row[b] - max(row[j] for j in range(k) if j != b)
        else:
            conf, p = np.inf, 0
            for i in range(c):
                for j in range(i + 1, c):
                    if i == b:
                        conf = min(conf, row[p])
                    if j == b:
                        conf = min(conf, -row[p])
                    p += 1
        return np.full(k, conf < tau), conf
    votes, gain, loss = np.zeros(c, int), np.zeros(c, int), np.zeros(c, int)
    p = 0
    for i in range(c):
        for j in range(i + 1, c):
            w, l = (i, j) if row[p] > 0 else (j, i)
            votes[w] += 1
            if abs(row[p]) < tau:
                loss[w] += 1
                gain[l] += 1
            p += 1
    b = int(np.argmax(votes))
    floor = votes[b] - loss[b]
    cont = [cc == b or votes[cc] + gain[cc] >= floor for cc in range(c)]
    need, p = np.zeros(k, bool), 0
    for i in range(c):
        for j in range(i + 1, c):
            need[p] = abs(row[p]) < tau and (cont[i] or cont[j])
            p += 1
    return need, np.min(np.abs(np.abs(row) - tau))


s_np = sc.copy()
stage_np, margin = [], []
for r in range(len(x)):
    need, conf = plan(sc[r])
    s_np[r, need] = se[r, need]
    stage_np.append("exact" if need.all() else ("partial" if need.any() else "compiled"))
    margin.append(abs(conf - tau) if np.isfinite(tau) else np.inf)

# --- onnxruntime ---------------------------------------------------------------------------
sess = ort.InferenceSession(onnx_path, providers=["CPUExecutionProvider"])
out = dict(zip([o.name for o in sess.get_outputs()], sess.run(None, {"input_rows": x.astype(np.float32)})))
stage_names = ["compiled", "exact", "partial"]

# --- score ---------------------------------------------------------------------------------
with open(score) as f:
    got = list(csv.DictReader(f))
dec = np.array([[float(r[k]) for k in got[0] if k.startswith("decision")] for r in got])
tol = 1e-4 * max(1.0, np.abs(dec).max()) + bound


near = 1e-3 * max(1.0, np.abs(dec).max())


def explained(r):
    # f32 may move a compiled decision across the threshold, or an exact one across zero.
    return margin[r] <= near or np.min(np.abs(dec[r])) <= near


excused = sum(explained(r) for r in range(len(x)))


bad_np = [r for r in range(len(x)) if (sr.labels(man, s_np[r:r + 1])[0] != got[r]["label"] or stage_np[r] != got[r]["stage"]) and not explained(r)]
labs = [v.decode() if isinstance(v, bytes) else str(v) for v in out["predicted_class"]]
bad_ort = [r for r in range(len(x)) if (labs[r] != got[r]["label"] or stage_names[int(out["stage"][r])] != got[r]["stage"]) and not explained(r)]
err_np = np.abs(s_np - dec).max()
err_ort = np.abs(out["decision"] - dec).max()
fallback = np.mean([s != "compiled" for s in stage_np])
ok = not bad_np and not bad_ort and err_ort <= tol and err_np <= tol
print(
    f"guarded ({g['rule']}, threshold {tau:.4g}): {fallback:.1%} of rows use the exact model; "
    f"numpy vs score max |Δ| {err_np:.2e}, onnxruntime vs score {err_ort:.2e} (tol {tol:.2e}); "
    f"label/stage differences unexplained: numpy {len(bad_np)}, onnxruntime {len(bad_ort)} "
    f"({excused} rows within {near:.1e} of the threshold or of zero may differ)"
)
sys.exit(0 if ok else 1)

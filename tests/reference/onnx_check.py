"""An exported ONNX model checked by the onnx package (check_model with full_check) and run
by onnxruntime on the data (its metadata must name the input columns in the data's order);
its outputs are compared with `kernelpress score` of the
compiled model. Tolerance: 1e-4 relative to the decision scale, plus the rounding bound of
f32 dot products, 64·2⁻²⁴·Σ|z_j·w_jc| (z the features, recomputed from the model file by the
README scorer, w the head): a model whose head cancels large terms cannot be closer in f32.
Usage: onnx_check.py MODEL.onnx COMPILED DATA.csv TARGET SCORE.csv"""
import csv
import sys

import numpy as np
import onnx
import onnxruntime as ort

from score_from_format_page import decision, load

onnx_path, compiled, data, target, score = sys.argv[1:6]
m = onnx.load(onnx_path)
onnx.checker.check_model(m, full_check=True)
opset = [o.version for o in m.opset_import if o.domain in ("", "ai.onnx")][0]
assert opset >= 13, opset
with open(data) as f:
    rows = list(csv.reader(f))
head = rows[0]
cols = [j for j in range(len(head)) if head[j] != target]
x = np.array([[float(r[j]) for j in cols] for r in rows[1:]])
# The artefact names its input columns, in order, in its metadata.
meta = {p.key: p.value for p in m.metadata_props}
assert meta["input_columns"] == ",".join(head[j] for j in cols), meta.get("input_columns")
assert meta["method"] and int(meta["features"]) > 0, meta
sess = ort.InferenceSession(onnx_path, providers=["CPUExecutionProvider"])
names = [o.name for o in sess.get_outputs()]
out = dict(zip(names, sess.run(None, {"input_rows": x.astype(np.float32)})))
with open(score) as f:
    got = list(csv.DictReader(f))
dec = np.array([[float(r[c]) for c in got[0] if c.startswith("decision")] for r in got])
t, man = load(compiled)
# The features z (README scorer) and the head give the f32 rounding scale.
s_ref, _ = decision(compiled, x)
inp = man["input"]
xs = (x - t["input.mean"]) / t["input.scale"] if inp["scaling"] == "standardize" else x
import score_from_format_page as sr
vals = [xs]
for i, st in enumerate(man["program"]["steps"]):
    vals.append(sr.run_step(st, [vals[j] for j in st["inputs"]], t, i))
z = vals[man["program"]["output"]]
scale = (np.abs(z) @ np.abs(t["head.weights"])).max()
tol = 1e-4 * max(1.0, np.abs(dec).max()) + 64 * 2.0**-24 * scale
err = np.abs(out["decision"] - dec).max()
ok = err <= tol and out["decision"].shape == dec.shape
msg = f"{man['source']['method']}: onnx vs score max |Δ| {err:.3e} (tol {tol:.3e})"
if "label" in got[0]:
    labs = [v.decode() if isinstance(v, bytes) else str(v) for v in out["predicted_class"]]
    same = np.mean([a == r["label"] for a, r in zip(labs, got)])
    idx = out["label_index"]
    names_ok = all(man["output"]["labels"][i] == l for i, l in zip(idx, labs))
    # Labels may differ only where f32 moved a decision across a boundary.
    close = np.min(np.abs(dec), axis=1) <= tol if dec.shape[1] > 0 else None
    bad = [i for i, (a, r) in enumerate(zip(labs, got)) if a != r["label"] and not close[i]]
    ok = ok and names_ok and not bad
    msg += f", labels equal {same:.4f} ({len(bad)} unexplained), index/name consistent {names_ok}"
print(msg)
sys.exit(0 if ok else 1)

"""Plain-weight exports scored in numpy: program.json + .npy files (and the same tensors in
one safetensors file), dequantized as the README describes (int8: q · scale per output;
float16 read as is), run through the README scorer's steps in float64. The precision check
that `export --check-data` reported is recomputed: max and RMS change of the decision
values against `score` of the float64 model, and the share of unchanged labels.
Usage: weights_check.py NPY_DIR WEIGHTS.safetensors DATA.csv TARGET SCORE.csv SUMMARY.json"""
import csv
import json
import os
import sys

import numpy as np
from safetensors import safe_open
from safetensors.numpy import load_file

import score_from_format_page as sr

npy_dir, st_path, data, target, score, summary = sys.argv[1:7]
desc = json.load(open(os.path.join(npy_dir, "program.json")))
raw = {name: np.load(os.path.join(npy_dir, e["file"])) for name, e in desc["tensors"].items()}
st = load_file(st_path)
with safe_open(st_path, framework="np") as f:
    st_desc = json.loads(f.metadata()["kernelpress"])
assert st_desc["program"] == desc["program"] and st_desc["precision"] == desc["precision"]
for name, arr in raw.items():
    assert np.array_equal(arr, st[name]), name


def value(name):
    e = desc["tensors"][name]
    a = raw[name]
    if e["dtype"] == "int8" and "scale" in e:
        s = raw[e["scale"]].astype(np.float32)
        s = s[:, None] if e["scale_axis"] == 0 else s[None, :]
        return (a.astype(np.float32) * s).astype(np.float64)
    return a.astype(np.float64) if a.dtype.kind == "f" else a


t = {name: value(name) for name in desc["tensors"] if not name.endswith(".scale") or name in ("input.scale",)}
with open(data) as f:
    rows = list(csv.reader(f))
head = rows[0]
cols = [j for j in range(len(head)) if head[j] != target]
x = np.array([[float(r[j]) for j in cols] for r in rows[1:]])
if desc["input"]["scaling"] == "standardize":
    x = (x - t["input.mean"]) / t["input.scale"]
vals = [x]
for i, stp in enumerate(desc["program"]["steps"]):
    vals.append(sr.run_step(stp, [vals[j] for j in stp["inputs"]], t, i))
dq = vals[desc["program"]["output"]] @ t["head.weights"] + t["head.bias"]
with open(score) as f:
    got = list(csv.DictReader(f))
d64 = np.array([[float(r[c]) for c in got[0] if c.startswith("decision")] for r in got])
diff = dq - d64
mx, rms = np.abs(diff).max(), np.sqrt(np.mean(diff**2))
chk = json.load(open(summary))["check"]
ok = abs(mx - chk["max_abs_decision_change"]) <= 1e-9 * max(1.0, mx) + 1e-12
ok &= abs(rms - chk["rms_decision_change"]) <= 1e-9 * max(1.0, rms) + 1e-12
msg = f"{desc['precision']}: max |Δ| {mx:.3e} (reported {chk['max_abs_decision_change']:.3e}), rms {rms:.3e}"
if "label" in got[0]:
    lq = sr.labels({"output": desc["output"]}, dq)
    l64 = sr.labels({"output": desc["output"]}, d64)
    agree = np.mean([a == b for a, b in zip(lq, l64)])
    ok &= abs(agree - chk["label_agreement"]) < 1e-12
    msg += f", labels unchanged {agree:.4f} (reported {chk['label_agreement']:.4f})"
print(msg)
sys.exit(0 if ok else 1)

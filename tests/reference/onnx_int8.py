"""int8 ONNX exports run by onnxruntime with its default graph optimisations (which fuse
DequantizeLinear with MatMul into kernels of their own rounding): the share of rows whose
label equals the f64 compiled model's (`kernelpress score`), against the figure that
`export --check-data` reported for the shipped arithmetic.
Usage: onnx_int8.py MODEL.onnx DATA.csv TARGET SCORE.csv SUMMARY.json MIN_AGREEMENT"""
import csv
import json
import sys

import numpy as np
import onnxruntime as ort

onnx_path, data, target, score, summary, least = sys.argv[1:7]
with open(data) as f:
    rows = list(csv.reader(f))
head = rows[0]
cols = [j for j in range(len(head)) if head[j] != target]
x = np.array([[float(r[j]) for j in cols] for r in rows[1:]], dtype=np.float32)
opts = ort.SessionOptions()
opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
sess = ort.InferenceSession(onnx_path, opts, providers=["CPUExecutionProvider"])
names = [o.name for o in sess.get_outputs()]
out = dict(zip(names, sess.run(None, {"input_rows": x})))
with open(score) as f:
    got = [r["label"] for r in csv.DictReader(f)]
labs = [v.decode() if isinstance(v, bytes) else str(v) for v in out["predicted_class"]]
ort_agree = float(np.mean([a == b for a, b in zip(labs, got)]))
chk = json.load(open(summary))["check"]["shipped_label_agreement"]
n = len(got)
# Disagreement rates within 10% of each other (one row of slack for small sets).
d_ort, d_chk = 1 - ort_agree, 1 - chk
close = abs(d_ort - d_chk) <= 0.1 * max(d_ort, d_chk) + 1.0 / n
ok = ort_agree >= float(least) and close
# The export's own run in onnxruntime (when it found one) saw the same labels.
rc = json.load(open(summary)).get("runtime_check")
if rc is not None:
    ok = ok and abs(rc["label_agreement"] - ort_agree) <= 1.0 / n
print(f"int8 in onnxruntime (all optimisations): labels as f64 on {ort_agree:.4f}, check reported {chk:.4f}, its own onnxruntime run {rc and rc['label_agreement']}")
sys.exit(0 if ok else 1)

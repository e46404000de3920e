"""ONNX-ML SVM files that are valid but unusual, or invalid, built with onnx.helper, and what
onnx.checker (full_check) and onnxruntime make of each: the references for how
`kernelpress import --onnx` must treat them.

  onnx_wiring.py DIR   writes DIR/CASE.onnx for each case, DIR/x.csv (rows to score),
                       DIR/unwired_labels.txt (onnxruntime's labels for the valid 'unwired'
                       case) and prints one JSON line {case: "ok" | "refused"} (refused: the
                       checker or onnxruntime raised)."""
import json
import os
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper

out = sys.argv[1]
rng = np.random.default_rng(11)
D, K = 3, 3
per = [3, 4, 3]
N = sum(per)


def svm_attrs(**over):
    a = dict(kernel_type="RBF", kernel_params=[0.5, 0.0, 0.0],
             support_vectors=rng.normal(size=N * D).tolist(), post_transform="NONE",
             coefficients=rng.normal(size=(K - 1) * N).tolist(),
             rho=rng.normal(size=K * (K - 1) // 2).tolist(), vectors_per_class=per,
             classlabels_strings=["a", "b", "c"])
    a.update(over)
    return a


def model(nodes, svm_input="X"):
    outs = [helper.make_tensor_value_info("label", TensorProto.STRING, [None]),
            helper.make_tensor_value_info("scores", TensorProto.FLOAT, [None, None])]
    g = helper.make_graph(nodes, "svm", [helper.make_tensor_value_info("X", TensorProto.FLOAT, [None, D])], outs)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("ai.onnx.ml", 3)])
    m.ir_version = 8
    return m


def node(inp="X", **over):
    return helper.make_node("SVMClassifier", [inp], ["label", "scores"], domain="ai.onnx.ml", **svm_attrs(**over))


scaler_ok = dict(offset=rng.normal(size=D).tolist(), scale=rng.uniform(0.5, 2.0, size=D).tolist())
cases = {}
# Valid: a Scaler beside the SVM, not on its input (onnxruntime ignores it).
cases["unwired"] = model([helper.make_node("Scaler", ["X"], ["Xs"], domain="ai.onnx.ml", **scaler_ok), node("X")])
# Invalid attribute types, names, duplicates and lengths.
cases["scale_as_ints"] = model([helper.make_node("Scaler", ["X"], ["Xs"], domain="ai.onnx.ml",
                                                 offset=scaler_ok["offset"], scale=[1, 2, 3]), node("Xs")])
cases["misspelt_scale"] = model([helper.make_node("Scaler", ["X"], ["Xs"], domain="ai.onnx.ml",
                                                  offset=scaler_ok["offset"], scales=scaler_ok["scale"]), node("Xs")])
bad = node("X")
for at in bad.attribute:
    if at.name == "kernel_type":
        at.CopyFrom(helper.make_attribute("kernel_type", 2))
cases["kernel_type_as_int"] = model([bad])
dup = node("X")
dup.attribute.append(helper.make_attribute("rho", rng.normal(size=3).tolist()))
cases["duplicate_attribute"] = model([dup])
cases["kernel_params_1"] = model([node("X", kernel_params=[0.5])])
cases["kernel_params_4"] = model([node("X", kernel_params=[0.5, 0.0, 0.0, 1.0])])
# vectors_per_class whose sum wraps around 2^64.
cases["vpc_wraps"] = model([node("X", vectors_per_class=[2**63 - 1, 2**63 - 1, 4])])

verdict = {}
x = rng.normal(size=(200, D)).astype(np.float32)
for name, m in cases.items():
    path = os.path.join(out, name + ".onnx")
    onnx.save(m, path)
    try:
        onnx.checker.check_model(m, full_check=True)
        sess = ort.InferenceSession(path, providers=["CPUExecutionProvider"])
        labels, _ = sess.run(None, {"X": x})
        verdict[name] = "ok"
        if name == "unwired":
            with open(os.path.join(out, "unwired_labels.txt"), "w") as f:
                f.write("\n".join(v.decode() if isinstance(v, bytes) else str(v) for v in labels) + "\n")
    except Exception:
        verdict[name] = "refused"
with open(os.path.join(out, "x.csv"), "w") as f:
    f.write(",".join(f"x{j}" for j in range(D)) + "\n")
    for r in x:
        f.write(",".join(repr(float(v)) for v in r) + "\n")
print(json.dumps(verdict))

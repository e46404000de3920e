"""ONNX-ML SVMs built with onnx.helper and run by onnxruntime, as references for
`kernelpress import --onnx`.
  onnx_svm.py make DIR   writes CASE.onnx, CASE_x.csv and CASE_ref.npz for every case
  onnx_svm.py check DIR  compares each CASE_score.csv (kernelpress score of the imported
                         model) with onnxruntime's labels and scores
Conventions checked (ONNX-ML operator definitions as onnxruntime evaluates them): 2 classes
give scores [-s, s] and the first label when s > 0; K > 2 classes give one score per pair
(i, j) in the order (0,1), (0,2), ..., a positive score voting for i."""
import csv
import glob
import os
import sys

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper

D = 4
KERNELS = {
    "LINEAR": [0.0, 0.0, 0.0],
    "POLY": [0.5, 1.0, 3.0],
    "RBF": [0.4, 0.0, 0.0],
    "SIGMOID": [0.3, 0.1, 0.0],
}


def svm_model(kind, k, kernel, labels, scaler, rng):
    per = [int(v) for v in rng.integers(2, 5, size=k)] if kind == "clf" else None
    n = sum(per) if per else 7
    attrs = dict(
        kernel_type=kernel,
        kernel_params=KERNELS[kernel],
        support_vectors=rng.normal(size=n * D).astype(np.float32).tolist(),
        post_transform="NONE",
    )
    nodes = []
    inp = "X"
    if scaler:
        nodes.append(helper.make_node("Scaler", ["X"], ["Xs"], domain="ai.onnx.ml",
                                      offset=rng.normal(size=D).tolist(),
                                      scale=rng.uniform(0.5, 2.0, size=D).tolist()))
        inp = "Xs"
    if kind == "clf":
        attrs.update(
            coefficients=rng.normal(size=(k - 1) * n).tolist(),
            rho=rng.normal(size=k * (k - 1) // 2).tolist(),
            vectors_per_class=per,
        )
        if labels == "ints":
            attrs["classlabels_ints"] = [3 * i + 1 for i in range(k)]
            ltype = TensorProto.INT64
        else:
            attrs["classlabels_strings"] = [f"class_{chr(97 + i)}" for i in range(k)]
            ltype = TensorProto.STRING
        nodes.append(helper.make_node("SVMClassifier", [inp], ["label", "scores"],
                                      domain="ai.onnx.ml", **attrs))
        outputs = [helper.make_tensor_value_info("label", ltype, [None]),
                   helper.make_tensor_value_info("scores", TensorProto.FLOAT, [None, None])]
    else:
        attrs.update(coefficients=rng.normal(size=n).tolist(), rho=[0.3], n_supports=n)
        nodes.append(helper.make_node("SVMRegressor", [inp], ["Y"], domain="ai.onnx.ml", **attrs))
        outputs = [helper.make_tensor_value_info("Y", TensorProto.FLOAT, [None, 1])]
    graph = helper.make_graph(nodes, "svm", [helper.make_tensor_value_info("X", TensorProto.FLOAT, [None, D])], outputs)
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("ai.onnx.ml", 3)])
    m.ir_version = 8
    onnx.checker.check_model(m, full_check=True)
    return m


def make(out):
    rng = np.random.default_rng(5)
    cases = []
    for kernel in KERNELS:
        for k in (2, 3, 4):
            cases.append((f"clf{k}_{kernel.lower()}_str", "clf", k, kernel, "strings", False))
        cases.append((f"clf3_{kernel.lower()}_int", "clf", 3, kernel, "ints", False))
        cases.append((f"reg_{kernel.lower()}", "reg", 0, kernel, None, False))
    cases.append(("clf2_rbf_int_scaler", "clf", 2, "RBF", "ints", True))
    cases.append(("clf4_rbf_str_scaler", "clf", 4, "RBF", "strings", True))
    for name, kind, k, kernel, labels, scaler in cases:
        m = svm_model(kind, k, kernel, labels, scaler, rng)
        path = os.path.join(out, f"{name}.onnx")
        onnx.save(m, path)
        x = rng.normal(size=(60, D)).astype(np.float32)
        with open(os.path.join(out, f"{name}_x.csv"), "w") as f:
            f.write(",".join(f"f{j}" for j in range(D)) + "\n")
            for r in x:
                f.write(",".join(repr(float(v)) for v in r) + "\n")
        res = ort.InferenceSession(path, providers=["CPUExecutionProvider"]).run(None, {"X": x})
        np.savez(os.path.join(out, f"{name}_ref.npz"), *res)
    # Files to refuse.
    bad = svm_model("clf", 3, "RBF", "strings", False, rng)
    for a in bad.graph.node[0].attribute:
        if a.name == "coefficients":
            del a.floats[-1]
    onnx.save(bad, os.path.join(out, "bad_coefficients.onnx"))
    bad = svm_model("clf", 2, "RBF", "strings", False, rng)
    bad.graph.node[0].attribute.append(helper.make_attribute("prob_a", [0.5]))
    onnx.save(bad, os.path.join(out, "bad_prob_a.onnx"))
    bad = svm_model("clf", 3, "RBF", "strings", False, rng)
    for a in bad.graph.node[0].attribute:
        if a.name == "post_transform":
            a.s = b"SOFTMAX"
    onnx.save(bad, os.path.join(out, "bad_post_transform.onnx"))
    good = open(os.path.join(out, "clf3_rbf_str.onnx"), "rb").read()
    open(os.path.join(out, "bad_truncated.onnx"), "wb").write(good[: len(good) // 2])
    open(os.path.join(out, "bad_garbage.onnx"), "wb").write(bytes(rng.integers(0, 256, 3000, dtype=np.uint8)))
    print(len(cases), "cases")


def check(out):
    worst = 0.0
    n = 0
    for ref in sorted(glob.glob(os.path.join(out, "*_ref.npz"))):
        name = os.path.basename(ref)[: -len("_ref.npz")]
        r = np.load(ref, allow_pickle=True)
        with open(os.path.join(out, f"{name}_score.csv")) as f:
            got = list(csv.DictReader(f))
        dec = np.array([[float(row[c]) for c in got[0] if c.startswith("decision")] for row in got])
        if name.startswith("reg"):
            want = r["arr_0"].reshape(-1, 1)
        else:
            labels, scores = r["arr_0"], r["arr_1"]
            lab = [row["label"] for row in got]
            want_lab = [v.decode() if isinstance(v, bytes) else str(v) for v in labels]
            want = scores[:, 1:2] if name.startswith("clf2") else scores
            if name.startswith("clf2"):
                assert np.allclose(scores[:, 0], -scores[:, 1]), "2-class scores are [-s, s]"
            # A label may differ only where the decision is within rounding of a tie.
            near = np.min(np.abs(want), axis=1) < 1e-4 * max(1.0, np.abs(want).max())
            bad = [i for i, (a, b) in enumerate(zip(lab, want_lab)) if a != b and not near[i]]
            assert not bad, f"{name}: labels differ at rows {bad[:5]}: {[lab[i] for i in bad[:5]]} vs {[want_lab[i] for i in bad[:5]]}"
        assert dec.shape == want.shape, (name, dec.shape, want.shape)
        err = np.abs(dec - want).max() / max(1.0, np.abs(want).max())
        assert err < 1e-4, f"{name}: relative error {err}"
        worst = max(worst, err)
        n += 1
    print(f"{n} imported SVMs agree with onnxruntime; worst relative error {worst:.2e}")


if __name__ == "__main__":
    {"make": make, "check": check}[sys.argv[1]](sys.argv[2])

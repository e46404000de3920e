"""Independent references for class probabilities.

  probabilities.py platt F.csv        F.csv rows "decision,outcome(0/1)": prints Platt's A B
                                      fitted by scipy.optimize.minimize (BFGS) on Platt's
                                      likelihood with his targets (Platt 1999)
  probabilities.py couple R.csv       R.csv: k×k pairwise probabilities r_ij per block of k
                                      rows; prints the class probabilities of Wu, Lin & Weng
                                      (2004) method 2 solved by scipy.optimize.minimize
                                      (SLSQP, Σp = 1, p ≥ 0), one line per block
  probabilities.py onnx DIR           writes ONNX-ML SVMClassifiers with prob_a/prob_b
                                      (2, 3 and 4 classes, RBF) built with onnx.helper,
                                      CASE_x.csv and CASE_prob.csv (onnxruntime's
                                      probabilities, columns in class-label order)
"""
import csv
import sys

import numpy as np


def platt(path):
    from scipy.optimize import minimize

    data = np.loadtxt(path, delimiter=",", ndmin=2)
    f, y = data[:, 0], data[:, 1] > 0.5
    npos, nneg = y.sum(), (~y).sum()
    t = np.where(y, (npos + 1) / (npos + 2), 1 / (nneg + 2))

    def nll(ab):
        z = ab[0] * f + ab[1]
        # -[t log p + (1-t) log(1-p)] with p = 1/(1+exp(z)), written stably.
        return np.sum(t * z + np.logaddexp(0, -z))

    r = minimize(nll, x0=[0.0, np.log((nneg + 1) / (npos + 1))], method="BFGS",
                 options={"gtol": 1e-10})
    print(f"{float(r.x[0])!r} {float(r.x[1])!r}")


def couple(path):
    from scipy.optimize import minimize

    rows = np.loadtxt(path, delimiter=",", ndmin=2)
    k = rows.shape[1]
    for b in range(rows.shape[0] // k):
        r = np.clip(rows[b * k:(b + 1) * k], 1e-7, 1 - 1e-7)

        def obj(p):
            return sum((r[j, i] * p[i] - r[i, j] * p[j]) ** 2
                       for i in range(k) for j in range(k) if i != j)

        res = minimize(obj, np.full(k, 1 / k), method="SLSQP",
                       constraints=[{"type": "eq", "fun": lambda p: p.sum() - 1}],
                       bounds=[(0, 1)] * k, options={"ftol": 1e-15, "maxiter": 500})
        print(" ".join(repr(float(v)) for v in res.x))


def onnx_cases(out):
    import onnx
    import onnxruntime as ort
    from onnx import TensorProto, helper

    rng = np.random.default_rng(7)
    d = 3
    for k in (2, 3, 4):
        per = [int(v) for v in rng.integers(3, 6, size=k)]
        n = sum(per)
        pairs = k * (k - 1) // 2
        attrs = dict(
            kernel_type="RBF", kernel_params=[0.5, 0.0, 0.0],
            support_vectors=rng.normal(size=n * d).astype(np.float32).tolist(),
            post_transform="NONE",
            coefficients=rng.normal(size=(k - 1) * n).tolist(),
            rho=rng.normal(scale=0.3, size=pairs).tolist(),
            vectors_per_class=per,
            classlabels_strings=[f"c{i}" for i in range(k)],
            prob_a=rng.uniform(-3.0, -0.5, size=pairs).tolist(),
            prob_b=rng.normal(scale=0.3, size=pairs).tolist(),
        )
        node = helper.make_node("SVMClassifier", ["X"], ["label", "probabilities"],
                                domain="ai.onnx.ml", **attrs)
        graph = helper.make_graph(
            [node], f"svm{k}",
            [helper.make_tensor_value_info("X", TensorProto.FLOAT, [None, d])],
            [helper.make_tensor_value_info("label", TensorProto.STRING, [None]),
             helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, None])])
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                        helper.make_opsetid("ai.onnx.ml", 3)])
        model.ir_version = 8
        onnx.checker.check_model(model, full_check=True)
        name = f"{out}/prob{k}"
        onnx.save(model, name + ".onnx")
        x = rng.normal(size=(200, d)).astype(np.float32)
        sess = ort.InferenceSession(name + ".onnx", providers=["CPUExecutionProvider"])
        _, p = sess.run(None, {"X": x})
        with open(name + "_x.csv", "w", newline="") as f:
            w = csv.writer(f)
            w.writerow([f"x{j}" for j in range(d)])
            w.writerows([[repr(float(v)) for v in row] for row in x])
        np.savetxt(name + "_prob.csv", np.asarray(p, dtype=np.float64), delimiter=",")
    print("ok")


if __name__ == "__main__":
    {"platt": platt, "couple": couple, "onnx": onnx_cases}[sys.argv[1]](sys.argv[2])

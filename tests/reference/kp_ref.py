"""Independent reference implementations for kernelpress's tests.

Written directly from the published formulas with numpy/scipy; nothing here calls
kernelpress code. Sources are named beside each formula.
"""
import json
import re

import numpy as np
from scipy.spatial.distance import cdist
from scipy.special import gamma as gamma_fn, kv


def gram(spec, a, b):
    """Gram matrix K(a, b) for a kernel given as a dict (name + parameters)."""
    name = spec["name"]
    if name == "gaussian":
        # exp(-gamma ||x-y||^2) (Rahimi & Recht 2007)
        return np.exp(-spec["gamma"] * cdist(a, b, "sqeuclidean"))
    if name == "gaussian_ls":
        ls = np.asarray(spec["lengthscale"], dtype=float)
        return np.exp(-0.5 * cdist(a / ls, b / ls, "sqeuclidean"))
    if name == "laplacian":
        # exp(-gamma ||x-y||_1)
        return np.exp(-spec["gamma"] * cdist(a, b, "cityblock"))
    if name == "matern":
        # General Matérn, GPML (Rasmussen & Williams 2006) eq. 4.14, via scipy.special.kv:
        # k(r) = 2^{1-nu}/Gamma(nu) (sqrt(2 nu) r / l)^nu K_nu(sqrt(2 nu) r / l)
        nu, ls = spec["nu"], spec["lengthscale"]
        r = cdist(a, b, "euclidean")
        z = np.sqrt(2 * nu) * r / ls
        with np.errstate(invalid="ignore", divide="ignore"):
            k = 2 ** (1 - nu) / gamma_fn(nu) * z**nu * kv(nu, z)
        k[z == 0] = 1.0
        return k
    if name == "rational_quadratic":
        al, ls = spec["alpha"], spec["lengthscale"]
        return (1 + cdist(a, b, "sqeuclidean") / (2 * al * ls**2)) ** (-al)
    if name == "polynomial":
        return (spec["gamma"] * a @ b.T + spec["coef0"]) ** spec["degree"]
    if name == "sigmoid":
        return np.tanh(spec["gamma"] * a @ b.T + spec["coef0"])
    if name == "linear":
        return a @ b.T
    if name == "arccos":
        # Cho & Saul, "Kernel Methods for Deep Learning", NIPS 2009:
        # k_n = (1/pi) |x|^n |y|^n J_n(theta), J_0 = pi - theta,
        # J_1 = sin(theta) + (pi - theta) cos(theta)
        na = np.linalg.norm(a, axis=1)[:, None]
        nb = np.linalg.norm(b, axis=1)[None, :]
        c = np.clip(a @ b.T / (na * nb), -1, 1)
        th = np.arccos(c)
        if spec["order"] == 0:
            return (np.pi - th) / np.pi
        return na * nb / np.pi * (np.sin(th) + (np.pi - th) * np.cos(th))
    if name == "sum":
        return sum(gram(p, a, b) for p in spec["parts"])
    if name == "product":
        out = np.ones((a.shape[0], b.shape[0]))
        for p in spec["parts"]:
            out = out * gram(p, a, b)
        return out
    if name == "scaled":
        return spec["c"] * gram(spec["inner"], a, b)
    raise ValueError(f"unknown kernel {name}")


_NUM = r"([-+0-9.eE]+)"


def spec_from_expression(expr):
    """Reads the few single-kernel expressions the file tests use into a spec dict."""
    m = re.fullmatch(r"gaussian\(gamma=" + _NUM + r"\)", expr)
    if m:
        return {"name": "gaussian", "gamma": float(m.group(1))}
    m = re.fullmatch(r"laplacian\(gamma=" + _NUM + r"\)", expr)
    if m:
        return {"name": "laplacian", "gamma": float(m.group(1))}
    m = re.fullmatch(r"polynomial\(degree=(\d+), gamma=" + _NUM + ", offset=" + _NUM + r"\)", expr)
    if m:
        return {"name": "polynomial", "degree": int(m.group(1)), "gamma": float(m.group(2)),
                "coef0": float(m.group(3))}
    if expr == "linear()":
        return {"name": "linear"}
    raise ValueError(f"reference reader does not know the expression {expr!r}")


def load_model(path):
    """Reads a kernelpress model with the safetensors package: (tensors, manifest)."""
    from safetensors import safe_open
    from safetensors.numpy import load_file

    tensors = load_file(path)
    with safe_open(path, framework="np") as f:
        meta = f.metadata()
    return tensors, json.loads(meta["kernelpress"])


def exact_decision(path, x):
    """Decision values of an exact model, recomputed from its tensors and manifest."""
    t, man = load_model(path)
    assert man["kind"] == "exact", man["kind"]
    if man["input"]["scaling"] == "standardize":
        x = (x - t["input.mean"]) / t["input.scale"]
    k = gram(spec_from_expression(man["kernel"]), x, t["exact.support_vectors"])
    return k @ t["exact.coefficients"] + t["exact.intercepts"], man


def labels_from_decision(task, labels, s):
    """The label rules of the README's "Label rules" (binary: positive = second label; ovr:
    argmax; ovo: pairs (0,1),(0,2),..., positive votes for the first, ties to the lowest);
    the one implementation is the README scorer's."""
    from score_from_format_page import labels as rule

    return rule({"output": {"task": task, "labels": labels}}, s)


def read_csv(path, target=None):
    import csv

    with open(path) as f:
        rows = list(csv.reader(f))
    head = rows[0]
    body = rows[1:]
    ti = head.index(target) if target in head else None
    cols = [j for j in range(len(head)) if j != ti]
    x = np.array([[float(r[j]) for j in cols] for r in body])
    y = [r[ti] for r in body] if ti is not None else None
    return x, y, [head[j] for j in cols]


def read_score(path):
    import csv

    with open(path) as f:
        rows = list(csv.DictReader(f))
    dec_cols = [c for c in rows[0].keys() if c.startswith("decision")]
    s = np.array([[float(r[c]) for c in dec_cols] for r in rows])
    labels = [r["label"] for r in rows] if "label" in rows[0] else None
    return s, labels


def compiled_decision(path, x):
    """Decision values of a compiled model, recomputed from its file by the scorer written
    from the README's description of the format (score_from_format_page.py)."""
    from score_from_format_page import decision

    return decision(path, x)

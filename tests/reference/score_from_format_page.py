"""Scores a kernelpress model file with numpy and the safetensors package alone, written from
the format page docs/format.md ("Model files (format version 2)") and the kernel table of docs/methods-and-kernels.md ("Kernel expressions") and from
nothing else (no kernelpress code, no scipy).

Usage: score_from_format_page.py MODEL DATA.csv TARGET SCORE.csv
Compares the decision values and labels with `kernelpress score` output (relative 1e-10)."""
import json
import re
import sys

import numpy as np
from safetensors import safe_open
from safetensors.numpy import load_file


# --- Kernel expressions (docs/methods-and-kernels.md, "Kernel expressions") -----------------------------------

def _tokens(text):
    return re.findall(r"\d+\.?\d*(?:[eE][-+]?\d+)?|\.\d+(?:[eE][-+]?\d+)?|[A-Za-z_][A-Za-z_0-9]*|[()\[\]=,*+]", text)


class _Parser:
    def __init__(self, text):
        self.t = _tokens(text)
        self.i = 0

    def peek(self):
        return self.t[self.i] if self.i < len(self.t) else None

    def take(self, want=None):
        tok = self.peek()
        if want is not None and tok != want:
            raise ValueError(f"expected {want!r}, found {tok!r}")
        self.i += 1
        return tok

    def expr(self):
        parts = [self.term()]
        while self.peek() == "+":
            self.take("+")
            parts.append(self.term())
        return parts[0] if len(parts) == 1 else ("sum", parts)

    def term(self):
        factors = [self.factor()]
        while self.peek() == "*":
            self.take("*")
            factors.append(self.factor())
        scale = 1.0
        kernels = []
        for f in factors:
            if isinstance(f, float):
                scale *= f
            else:
                kernels.append(f)
        k = kernels[0] if len(kernels) == 1 else ("product", kernels)
        return k if scale == 1.0 else ("scaled", scale, k)

    def factor(self):
        tok = self.peek()
        if tok == "(":
            self.take("(")
            e = self.expr()
            self.take(")")
            return e
        if re.match(r"[\d.]", tok):
            return float(self.take())
        name = self.take()
        self.take("(")
        params = {}
        while self.peek() != ")":
            key = self.take()
            self.take("=")
            if self.peek() == "[":
                self.take("[")
                vals = []
                while self.peek() != "]":
                    vals.append(float(self.take()))
                    if self.peek() == ",":
                        self.take(",")
                self.take("]")
                params[key] = np.array(vals)
            else:
                params[key] = float(self.take())
            if self.peek() == ",":
                self.take(",")
        self.take(")")
        return ("leaf", name, params)


def _sqdist(a, b):
    return np.maximum((a * a).sum(1)[:, None] + (b * b).sum(1)[None, :] - 2 * a @ b.T, 0.0)


def kernel_matrix(k, a, b):
    """K(a, b) from the kernel table of docs/methods-and-kernels.md."""
    if k[0] == "sum":
        return sum(kernel_matrix(p, a, b) for p in k[1])
    if k[0] == "product":
        out = np.ones((a.shape[0], b.shape[0]))
        for p in k[1]:
            out = out * kernel_matrix(p, a, b)
        return out
    if k[0] == "scaled":
        return k[1] * kernel_matrix(k[2], a, b)
    _, name, p = k
    if name in ("gaussian", "laplacian", "matern", "rational_quadratic"):
        if "gamma" in p:
            g = p["gamma"]
            if name == "gaussian":
                return np.exp(-g * _sqdist(a, b))
            return np.exp(-g * np.abs(a[:, None, :] - b[None, :, :]).sum(2))
        ls = p.get("lengthscale", 1.0)
        a, b = a / ls, b / ls
        if name == "gaussian":
            return np.exp(-0.5 * _sqdist(a, b))
        if name == "laplacian":
            return np.exp(-np.abs(a[:, None, :] - b[None, :, :]).sum(2))
        r = np.sqrt(_sqdist(a, b))
        if name == "matern":
            nu = p["nu"]
            if nu == 0.5:
                return np.exp(-r)
            if nu == 1.5:
                return (1 + np.sqrt(3) * r) * np.exp(-np.sqrt(3) * r)
            return (1 + np.sqrt(5) * r + 5 * r * r / 3) * np.exp(-np.sqrt(5) * r)
        al = p.get("alpha", 1.0)
        return (1 + r * r / (2 * al)) ** (-al)
    if name == "polynomial":
        return (p.get("gamma", 1.0) * a @ b.T + p.get("offset", p.get("coef0", 1.0))) ** int(p["degree"])
    if name == "linear":
        return a @ b.T
    if name == "sigmoid":
        return np.tanh(p.get("gamma", 1.0) * a @ b.T + p.get("offset", p.get("coef0", 0.0)))
    if name == "arccos":
        na = np.linalg.norm(a, axis=1)[:, None]
        nb = np.linalg.norm(b, axis=1)[None, :]
        th = np.arccos(np.clip(a @ b.T / (na * nb), -1, 1))
        if p.get("order", 1.0) == 0:
            return (np.pi - th) / np.pi
        return na * nb / np.pi * (np.sin(th) + (np.pi - th) * np.cos(th))
    raise ValueError(f"kernel {name} not in the kernel table")


def parse_kernel(text):
    return _Parser(text).expr()


# --- Model files (docs/format.md, "Model files (format version 2)") ------------------------------

def load(path):
    t = load_file(path)
    with safe_open(path, framework="np") as f:
        man = json.loads(f.metadata()["kernelpress"])
    assert man["format_version"] == 2, man["format_version"]
    return t, man


def hadamard_blocks(u, block):
    """Each consecutive block b replaced by H b (Sylvester: H1 = [1], H2n = [[Hn, Hn], [Hn, -Hn]])."""
    h = np.array([[1.0]])
    while h.shape[0] < block:
        h = np.block([[h, h], [h, -h]])
    n = u.shape[1]
    return np.concatenate([u[:, i:i + block] @ h.T for i in range(0, n, block)], axis=1)


def run_step(st, ins, t, i):
    op = st["op"]
    f = lambda name: t[f"step{i}.{name}"]
    u = ins[0]
    if op == "scale":
        return u * f("factors")
    if op == "times":
        return st["c"] * u
    if op == "pad":
        return np.concatenate([u, np.zeros((u.shape[0], st["to"] - u.shape[1]))], axis=1)
    if op == "tile":
        return np.concatenate([u] * st["copies"], axis=1)
    if op == "signs":
        return u * f("signs").astype(float)
    if op == "wht":
        return hadamard_blocks(u, st["block"])
    if op == "gather":
        return u[:, f("indices")]
    if op == "dense":
        return u @ f("weights").T
    if op == "cos_sin":
        return np.concatenate([st["c"] * np.cos(u), st["c"] * np.sin(u)], axis=1)
    if op == "cos_phase":
        return st["c"] * np.cos(u + f("phases"))
    if op == "kernel_block":
        return kernel_matrix(parse_kernel(st["kernel"]), u, f("landmarks"))
    if op == "count_sketch_fft":
        w = st["width"]
        buckets, signs = f("buckets"), f("signs").astype(float)
        acc = np.ones((u.shape[0], w), dtype=complex)
        for q in range(buckets.shape[0]):
            c = np.zeros((u.shape[0], w))
            for j in range(u.shape[1]):
                c[:, buckets[q, j]] += signs[q, j] * u[:, j]
            acc = acc * np.fft.fft(c, axis=1)
        return np.real(np.fft.ifft(acc, axis=1))
    if op == "relu":
        return np.maximum(u, 0.0)
    if op == "step":
        return (u > 0).astype(float)
    if op == "concat":
        return np.concatenate(ins, axis=1)
    if op == "product":
        out = np.ones((u.shape[0], max(v.shape[1] for v in ins)))
        for v in ins:
            out = out * v
        return out
    if op == "append":
        return np.concatenate([u, np.full((u.shape[0], 1), st["c"])], axis=1)
    if op == "segment_product":
        out, at = [], 0
        for n in f("lengths"):
            out.append(np.prod(u[:, at:at + n], axis=1))
            at += n
        return np.stack(out, axis=1)
    raise ValueError(f"op {op} not in the kernel table")


def decision(path, x):
    t, man = load(path)
    inp = man["input"]
    assert x.shape[1] == inp["dim"]
    if inp["scaling"] == "standardize":
        x = (x - t["input.mean"]) / t["input.scale"]
    if man["kind"] == "exact":
        k = kernel_matrix(parse_kernel(man["kernel"]), x, t["exact.support_vectors"])
        return k @ t["exact.coefficients"] + t["exact.intercepts"], man
    prog = man["program"]
    vals = [x]
    for i, st in enumerate(prog["steps"]):
        vals.append(run_step(st, [vals[j] for j in st["inputs"]], t, i))
    z = vals[prog["output"]]
    return z @ t["head.weights"] + t["head.bias"], man


def labels(man, s):
    out = man["output"]
    task, names = out["task"], out["labels"]
    if task == "regression":
        return None
    if task == "binary":
        return [names[1] if v > 0 else names[0] for v in s[:, 0]]
    if task == "ovr":
        return [names[i] for i in np.argmax(s, axis=1)]
    c = len(names)
    res = []
    for row in s:
        votes = np.zeros(c, dtype=int)
        p = 0
        for i in range(c):
            for j in range(i + 1, c):
                votes[i if row[p] > 0 else j] += 1
                p += 1
        res.append(names[int(np.argmax(votes))])
    return res


def main():
    import csv

    model, data, target, score = sys.argv[1:5]
    with open(data) as f:
        rows = list(csv.reader(f))
    head = rows[0]
    cols = [j for j in range(len(head)) if head[j] != target]
    x = np.array([[float(r[j]) for j in cols] for r in rows[1:]])
    s_ref, man = decision(model, x)
    with open(score) as f:
        got = list(csv.DictReader(f))
    dec = [c for c in got[0].keys() if c.startswith("decision")]
    s_got = np.array([[float(r[c]) for c in dec] for r in got])
    err = np.max(np.abs(s_ref - s_got)) / max(1.0, np.max(np.abs(s_ref)))
    lab_ref = labels(man, s_ref)
    same = lab_ref is None or lab_ref == [r["label"] for r in got]
    ops = ",".join(st["op"] for st in man.get("program", {}).get("steps", []))
    print(f"{man['kind']} {man.get('source', {}).get('method', '')}: decision rel err {err:.3e}, labels equal {same}; steps {ops}")
    sys.exit(0 if err < 1e-10 and same else 1)


if __name__ == "__main__":
    main()

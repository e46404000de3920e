"""A compiled model scored with a low-precision head (`score --f32` of a model compiled
with `--head-precision`), recomputed in numpy from the model file by the rule written in
docs/format.md ("Head precision"): features from the format-page scorer (f64, then rounded
to f32), then
  bf16: features and head weights rounded to bfloat16 (nearest, ties to even), products
        summed (here in f64);
  int8: head weights int8 per output column (scale = largest |w| / 127, round half away
        from zero), each row's features int8 (scale = largest |z| / 127, round half to
        even), integer sums, both scales applied.
Checks that score's decisions match within the features' f32 rounding, that the labels
match, and that the low-precision decisions differ from the f64 path's (so the path was
taken). Prints a JSON summary.
Usage: head_precision_check.py MODEL DATA.csv TARGET SCORE_F32.csv SCORE_F64.csv"""
import json
import sys

import numpy as np

from kp_ref import labels_from_decision, read_csv, read_score
from score_from_format_page import load, run_step

model, data, target, s32_path, s64_path = sys.argv[1:6]
x, _, _ = read_csv(data, target)
t, man = load(model)
prec = man["head"].get("precision", "f32")
inp = man["input"]
if inp["scaling"] == "standardize":
    x = (x - t["input.mean"]) / t["input.scale"]
prog = man["program"]
vals = [x]
for i, st in enumerate(prog["steps"]):
    vals.append(run_step(st, [vals[j] for j in st["inputs"]], t, i))
z = vals[prog["output"]].astype(np.float32)
w = t["head.weights"]
b = t["head.bias"]


def bf16(a):
    """float32 → bfloat16 → float32, nearest, ties to even."""
    u = np.ascontiguousarray(a, dtype=np.float32).view(np.uint32).astype(np.uint64)
    r = (u + 0x7FFF + ((u >> 16) & 1)) >> 16
    return (r.astype(np.uint32) << 16).view(np.float32)


if prec == "bf16":
    s = bf16(z).astype(np.float64) @ bf16(w.astype(np.float32)).astype(np.float64) + b
    # Each feature may round to a neighbouring bfloat16 value when its f32 value differs
    # from score's (its own f32 program) by a rounding: a step of 2^-8 of the feature.
    tol = 2.0**-7 * (np.abs(z).astype(np.float64) @ np.abs(w)).max()
elif prec == "int8":
    amax = np.abs(w).max(axis=0)
    scale = np.where(amax > 0, (amax / 127.0).astype(np.float32), np.float32(1.0)).astype(np.float64)
    q = np.clip(np.sign(w) * np.floor(np.abs(w) / scale + 0.5), -127, 127).astype(np.int64)
    zmax = np.abs(z).max(axis=1).astype(np.float32)
    inv = (np.float32(127.0) / zmax).astype(np.float32)
    c = np.rint(z * inv[:, None]).astype(np.int64)
    s = (c @ q).astype(np.float64) * (zmax / np.float32(127.0)).astype(np.float64)[:, None] * scale + b
    # A feature whose f32 value differs from score's by a rounding can land on the
    # neighbouring integer: one step of the row's scale times the weight.
    tol = 4 * (zmax.astype(np.float64) / 127.0)[:, None].max() * np.abs(w).max()
else:
    raise SystemExit(f"model has head precision {prec}; expected bf16 or int8")
s32, l32 = read_score(s32_path)
s64, l64 = read_score(s64_path)
err = float(np.abs(s - s32).max())
moved = float(np.abs(s64 - s32).max())
task, names = man["output"]["task"], man["output"]["labels"]
lab = labels_from_decision(task, names, s)
same = float(np.mean([a == c for a, c in zip(lab, l32)]))
print(json.dumps({"precision": prec, "max_abs_difference": err, "tolerance": float(tol),
                  "moved_from_f64": moved, "labels_equal": same}))
ok = err <= tol and same >= 0.99 and moved > 1e-6
sys.exit(0 if ok else 1)

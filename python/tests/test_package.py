"""The Python package against the command-line tool, numpy and the files it writes."""

import csv
import pickle
import threading
import time

import numpy as np
import pytest

import kernelpress as kp


def read_score(path):
    with open(path) as f:
        rows = list(csv.DictReader(f))
    cols = [c for c in rows[0] if c.startswith("decision")]
    return np.array([[float(r[c]) for c in cols] for r in rows]), [r.get("label") for r in rows]


def test_three_line_compile_of_the_demo(root):
    exact = kp.ExactModel.load(root / "models" / "pump_svm.safetensors")
    compiled = kp.compact(exact, str(root / "models" / "pump_calib.csv"), method="nystrom", features=1024)
    assert compiled.features == 1024
    assert compiled.report["agreement"] > 0.98
    assert "audit rows" in compiled.report["evaluated_on"]


def test_exact_decision_matches_numpy_and_score(root, exact, test_rows, cli, tmp_path):
    x, cols, _ = test_rows
    # The expansion written out in numpy from the model file (safetensors package):
    # Σ coef · exp(−γ‖x − sv‖²) + b, inputs scaled as the manifest says.
    import json
    from safetensors import safe_open
    from safetensors.numpy import load_file

    path = root / "models" / "pump_svm.safetensors"
    t = load_file(path)
    with safe_open(path, "np") as f:
        man = json.loads(f.metadata()["kernelpress"])
    assert man["kernel"] == "gaussian(gamma=0.25)" and man["input"]["scaling"] == "standardize"
    xs = (x - t["input.mean"]) / t["input.scale"]
    sv, coef, b = t["exact.support_vectors"], t["exact.coefficients"], t["exact.intercepts"]
    d2 = ((xs[:, None, :] - sv[None, :, :]) ** 2).sum(-1)
    ref = np.exp(-0.25 * d2) @ coef + b
    got = exact.decision(x)
    assert np.abs(got - ref).max() < 1e-9
    cli("score", "--decisions", root / "models" / "pump_svm.safetensors", "--data", root / "models" / "pump_test.csv",
        "--target", "condition", "--out", tmp_path / "s.csv")
    s, labels = read_score(tmp_path / "s.csv")
    assert np.abs(got - s).max() < 1e-9 * max(1.0, np.abs(s).max())
    assert exact.predict(x) == labels


METHODS = [
    ("gaussian(gamma=0.25)", "fourier"),
    ("gaussian(gamma=0.25)", "orthogonal"),
    ("gaussian(gamma=0.25)", "hadamard"),
    ("gaussian(gamma=0.25)", "fastfood"),
    ("gaussian(gamma=0.25)", "quasi"),
    ("gaussian(gamma=0.25)", "nystrom"),
    ("gaussian(gamma=0.25)", "taylor"),
    ("laplacian(gamma=0.2)", "fourier"),
    ("polynomial(degree=2, gamma=0.5, offset=1)", "maclaurin"),
    ("polynomial(degree=2, gamma=0.5, offset=1)", "tensorsketch"),
    ("arccos(order=1)", "relu"),
]


@pytest.mark.parametrize("kernel,method", METHODS)
def test_decision_equals_cli_score_for_every_method(root, cli, tmp_path, kernel, method):
    # A one-vs-rest kernel ridge teacher of the given kernel, trained by the CLI on the
    # first 1,500 demo training rows (standardised).
    data = tmp_path / "train.csv"
    data.write_text("\n".join((root / "models" / "pump_train.csv").read_text().splitlines()[:1501]) + "\n")
    teacher = tmp_path / "t.safetensors"
    cli("train", "--data", data, "--target", "condition", "--kernel", kernel, "--model", "ridge",
        "--classify", "--standardize", "--ridge", "1", "--out", teacher)
    exact = kp.ExactModel.load(teacher)
    calib = str(root / "models" / "pump_calib.csv")
    features = 165 if method == "taylor" else 256
    compiled = kp.compact(exact, calib, method, features, seed=3, bandwidth_search=False)
    path = tmp_path / "c.safetensors"
    compiled.save(path)
    x, _, _ = kp.read_data(root / "models" / "pump_test.csv", target="condition")
    cli("score", "--decisions", path, "--data", root / "models" / "pump_test.csv", "--target", "condition", "--out", tmp_path / "s.csv")
    s, labels = read_score(tmp_path / "s.csv")
    got = compiled.decision(x)
    assert np.abs(got - s).max() <= 1e-9 * max(1.0, np.abs(s).max())
    assert compiled.predict(x) == labels
    # The CLI's compile with the same settings writes the same model.
    cli("compile", teacher, "--calib", calib, "--method", method, "--features", features, "--seed", 3,
        "--no-bandwidth-search", "--no-timing", "--out", tmp_path / "cli.safetensors")
    other = kp.CompiledModel.load(tmp_path / "cli.safetensors")
    assert np.abs(other.decision(x) - got).max() <= 1e-12 * max(1.0, np.abs(s).max())


def test_round_trips(tmp_path, exact, test_rows):
    x = test_rows[0][:50]
    c = kp.compact(exact, test_rows[0], "hadamard", 256, seed=2, bandwidth_search=False)
    for m, cls in [(exact, kp.ExactModel), (c, kp.CompiledModel)]:
        p = tmp_path / "m.safetensors"
        m.save(p)
        for back in (cls.load(p), cls.from_bytes(m.to_bytes()), pickle.loads(pickle.dumps(m))):
            assert np.array_equal(back.decision(x), m.decision(x))
        assert p.read_bytes() == m.to_bytes()
    # Another kind is refused with the library's message.
    with pytest.raises(kp.Error) as e:
        kp.ExactModel.load(tmp_path / "m.safetensors")
    assert e.value.kind == "file" or e.value.kind == "input"
    assert e.value.exit_code == 2


def test_from_arrays_matches_a_numpy_expansion():
    rng = np.random.default_rng(5)
    sv = rng.normal(size=(40, 3))
    coef = rng.normal(size=(40, 3))
    b = [0.1, -0.2, 0.3]
    m = kp.ExactModel.from_expansion(sv, coef, b, "laplacian(gamma=0.7)", labels=["a", "b", "c"])
    assert m.task == "ovr"
    x = rng.normal(size=(25, 3))
    ref = np.exp(-0.7 * np.abs(x[:, None, :] - sv[None]).sum(-1)) @ coef + b
    assert np.abs(m.decision(x) - ref).max() < 1e-12
    assert m.predict(x) == [["a", "b", "c"][i] for i in ref.argmax(1)]


def test_featurize_matches_cli_and_the_kernel(root, cli, tmp_path):
    rng = np.random.default_rng(1)
    x = rng.normal(size=(60, 4))
    z = kp.featurize("gaussian(gamma=0.3)", "orthogonal", 2048, x, seed=7)
    np.save(tmp_path / "x.npy", x)
    cli("featurize", "--kernel", "gaussian(gamma=0.3)", "--method", "orthogonal", "--features", 2048,
        "--seed", 7, "--data", tmp_path / "x.npy", "--out", tmp_path / "z.npy")
    assert np.array_equal(np.load(tmp_path / "z.npy"), z)
    from scipy.spatial.distance import cdist

    k = np.exp(-0.3 * cdist(x, x, "sqeuclidean"))
    assert np.linalg.norm(z @ z.T - k) / np.linalg.norm(k) < 0.1


def test_report_matches_cli_report(root, cli, tmp_path, exact, test_rows):
    x, _, y = test_rows
    c = kp.compact(exact, str(root / "models" / "pump_calib.csv"), "fastfood", 512, seed=4, bandwidth_search=False)
    c.save(tmp_path / "c.safetensors")
    r = kp.report(c, exact, x, labels=y)
    cli("report", tmp_path / "c.safetensors", "--exact", root / "models" / "pump_svm.safetensors", "--data",
        root / "models" / "pump_test.csv", "--target", "condition", "--json", tmp_path / "r.json", "--no-timing")
    import json

    ref = json.load(open(tmp_path / "r.json"))
    for key in ["agreement", "accuracy_exact", "accuracy_compiled", "decision_rmse", "kernel_rmse", "n_rows",
                "bytes_compiled", "flops_compiled"]:
        assert r[key] == pytest.approx(ref[key], rel=1e-12), key


def test_onnx_export_runs_in_onnxruntime(tmp_path, exact, test_rows):
    ort = pytest.importorskip("onnxruntime")
    x = test_rows[0]
    c = kp.compact(exact, x, "hadamard", 512, seed=1, bandwidth_search=False)
    s = kp.export(c, "onnx", tmp_path / "m.onnx")
    assert s["format"] == "onnx"
    sess = ort.InferenceSession(str(tmp_path / "m.onnx"))
    name = sess.get_inputs()[0].name
    outs = sess.run(None, {name: x.astype(np.float32)})
    dec = [o for o in outs if np.issubdtype(np.asarray(o).dtype, np.floating)][0]
    assert np.abs(np.asarray(dec).reshape(len(x), -1) - c.decision(x)).max() < 1e-3


def cli_error(cli, model, tmp_path, arr):
    np.save(tmp_path / "bad.npy", arr)
    p = cli("score", model, "--data", tmp_path / "bad.npy", check=False)
    assert p.returncode == 2
    msg = p.stderr.strip().splitlines()[-1]
    return msg.split(str(tmp_path / "bad.npy") + ": ", 1)[1]


@pytest.mark.parametrize(
    "arr",
    [
        np.ones((4, 3)),  # wrong width
        np.full((3, 8), np.nan),  # NaN
        np.where(np.arange(16).reshape(2, 8) == 11, np.inf, 1.0),  # inf in row 2
        np.array([["a"] * 8]),  # strings
        np.ones((2, 2, 2)),  # 3-D
    ],
)
def test_bad_arrays_raise_the_cli_message(root, cli, tmp_path, exact, arr):
    with pytest.raises(kp.Error) as e:
        exact.decision(arr)
    assert e.value.exit_code == 2 and e.value.kind == "input"
    ours = str(e.value).split("x: ", 1)[1]
    assert ours == cli_error(cli, root / "models" / "pump_svm.safetensors", tmp_path, arr)


def test_layouts_give_the_same_decisions(exact, test_rows):
    x = np.ascontiguousarray(test_rows[0][:64])
    ref = exact.decision(x)
    f = np.asfortranarray(x)
    assert np.array_equal(exact.decision(f), ref)
    assert np.array_equal(exact.decision(x.astype(np.float32).astype(np.float64)),
                          exact.decision(x.astype(np.float32)))
    # An unaligned float64 buffer (pickle protocol 5 can hand these out).
    buf = np.zeros(x.size * 8 + 1, dtype=np.uint8)
    u = np.frombuffer(buf.data, dtype=np.float64, count=x.size, offset=1).reshape(x.shape)
    u[...] = x
    assert not u.flags.aligned
    assert np.array_equal(exact.decision(u), ref)
    # Every other row: a strided view.
    assert np.array_equal(exact.decision(x[::2]), ref[::2])


def test_the_lock_is_released_during_long_work(exact, test_rows):
    x = np.tile(test_rows[0], (6, 1))
    ticks = []
    stop = threading.Event()

    def tick():
        while not stop.is_set():
            ticks.append(time.perf_counter())
            time.sleep(0.001)

    t = threading.Thread(target=tick)
    t.start()
    t0 = time.perf_counter()
    kp.compact(exact, x, "fourier", 1024, bandwidth_search=False)
    t1 = time.perf_counter()
    stop.set()
    t.join()
    during = [v for v in ticks if t0 < v < t1]
    # With the lock held for the whole call the other thread could not run at all.
    assert len(during) >= 10, (len(during), t1 - t0)


def test_names_of_our_own_and_no_builtin_shadowed():
    # The compile entry point does not shadow Python's built-in compile().
    assert not hasattr(kp, "compile")
    assert callable(kp.compact) and callable(kp.ExactModel.from_expansion)
    assert not hasattr(kp.ExactModel, "from_arrays")


def test_refined_compact_equals_cli_refine(root, cli, tmp_path, exact):
    # compact(refine=N) runs the library's refinement, as `compile --refine N` does: the
    # same model, and its report says what moved.
    calib = tmp_path / "calib.csv"
    calib.write_text("\n".join((root / "models" / "pump_calib.csv").read_text().splitlines()[:1501]) + "\n")
    c = kp.compact(exact, str(calib), "hadamard", 128, seed=2, bandwidth_search=False, refine=2)
    out = tmp_path / "cli.safetensors"
    cli("compile", root / "models" / "pump_svm.safetensors", "--calib", calib, "--target", "condition",
        "--method", "hadamard", "--features", 128, "--seed", 2, "--no-bandwidth-search", "--refine", 2,
        "--no-timing", "--out", out)
    other = kp.CompiledModel.load(out)
    x, _, _ = kp.read_data(root / "models" / "pump_test.csv", target="condition")
    assert np.abs(other.decision(x) - c.decision(x)).max() <= 1e-12 * max(1.0, np.abs(c.decision(x)).max())
    with pytest.raises(kp.Error):
        kp.compact(exact, str(calib), "hadamard", 128, refine=0)


def test_factored_compact_equals_cli_head_rank(root, cli, tmp_path, exact):
    # compact(head_rank=R) factors the head as `compile --head-rank R` does.
    calib = tmp_path / "calib.csv"
    calib.write_text("\n".join((root / "models" / "pump_calib.csv").read_text().splitlines()[:1501]) + "\n")
    c = kp.compact(exact, str(calib), "hadamard", 128, seed=2, bandwidth_search=False, head_rank=2)
    assert c.fit["factored_head"]["rank"] == 2
    out = tmp_path / "cli.safetensors"
    cli("compile", root / "models" / "pump_svm.safetensors", "--calib", calib, "--target", "condition",
        "--method", "hadamard", "--features", 128, "--seed", 2, "--no-bandwidth-search",
        "--head-rank", 2, "--no-timing", "--out", out)
    other = kp.CompiledModel.load(out)
    x, _, _ = kp.read_data(root / "models" / "pump_test.csv", target="condition")
    assert np.abs(other.decision(x) - c.decision(x)).max() <= 1e-12 * max(1.0, np.abs(c.decision(x)).max())
    auto = kp.compact(exact, str(calib), "hadamard", 128, seed=2, bandwidth_search=False, head_rank="auto")
    assert "factored_head" in auto.fit
    for bad in (0, "some"):
        with pytest.raises(kp.Error, match="head_rank|head rank"):
            kp.compact(exact, str(calib), "hadamard", 128, head_rank=bad)


def test_low_precision_head_equals_cli_head_precision(root, cli, tmp_path, exact):
    # compact(head_precision=P) sets the head precision as `compile --head-precision P`
    # does: the two files score the same with `score --f32`, and differently from the f32
    # head (so the precision was taken).
    calib = tmp_path / "calib.csv"
    calib.write_text("\n".join((root / "models" / "pump_calib.csv").read_text().splitlines()[:1501]) + "\n")
    test = root / "models" / "pump_test.csv"
    scores = {}
    for prec in ("f32", "int8", "bf16"):
        c = kp.compact(exact, str(calib), "hadamard", 256, seed=2, bandwidth_search=False, head_precision=prec)
        mine = tmp_path / f"py_{prec}.safetensors"
        c.save(mine)
        out = tmp_path / f"cli_{prec}.safetensors"
        cli("compile", root / "models" / "pump_svm.safetensors", "--calib", calib, "--target", "condition",
            "--method", "hadamard", "--features", 256, "--seed", 2, "--no-bandwidth-search",
            "--head-precision", prec, "--no-timing", "--out", out)
        texts = []
        for f in (mine, out):
            sc = tmp_path / f"score_{f.stem}.csv"
            cli("score", "--decisions", f, "--data", test, "--target", "condition", "--f32", "--out", sc)
            texts.append(sc.read_text())
        assert texts[0] == texts[1], prec
        scores[prec] = texts[0]
    assert scores["int8"] != scores["f32"] and scores["bf16"] != scores["f32"]
    auto = kp.compact(exact, str(calib), "hadamard", 256, seed=2, bandwidth_search=False, head_precision="auto")
    assert auto.fit["head_precision"]["chosen"] in ("f32", "bf16", "int8")
    with pytest.raises(kp.Error, match="head_precision"):
        kp.compact(exact, str(calib), "hadamard", 256, head_precision="int4")


def test_guard_equals_cli_guard_and_scores_like_score(root, cli, tmp_path, exact):
    # kp.guard chooses the threshold as `compile --guard-agreement` does (the library's
    # guard_on_audit_rows); the guarded model scores, stages and pickles like the file the
    # command line wrote, and exports whole.
    calib = tmp_path / "calib.csv"
    calib.write_text("\n".join((root / "models" / "pump_calib.csv").read_text().splitlines()[:3001]) + "\n")
    test = root / "models" / "pump_test.csv"
    with pytest.warns(UserWarning, match="agreement"):
        c = kp.compact(exact, str(calib), "fourier", 64, bandwidth_search=False)
    x, _, y = kp.read_data(test, target="condition")
    g = kp.guard(c, exact, str(calib), agreement=0.98, rule="row", eval=x, eval_labels=y)
    out = tmp_path / "cli.safetensors"
    cli("compile", root / "models" / "pump_svm.safetensors", "--calib", calib, "--target", "condition",
        "--method", "fourier", "--features", 64, "--no-bandwidth-search", "--guard-agreement", 0.98,
        "--guard-rule", "row", "--eval", test, "--no-timing", "--out", out)
    other = kp.GuardedModel.load(out)
    assert g.threshold == other.threshold and g.rule == other.rule
    s, stage = g.decision_with_stage(x)
    s2, stage2 = other.decision_with_stage(x)
    assert np.array_equal(s, s2) and stage == stage2
    assert 0.05 <= np.mean([t != "compiled" for t in stage]) < 1.0
    # The command line's score of the same file: labels, decisions, stage column.
    sc = tmp_path / "score.csv"
    cli("score", "--decisions", out, "--data", test, "--target", "condition", "--out", sc)
    with open(sc) as f:
        rows = list(csv.DictReader(f))
    assert [r["stage"] for r in rows] == stage
    assert [r["label"] for r in rows] == g.predict(x)
    dec, _ = read_score(sc)
    assert np.abs(dec - s).max() <= 1e-12 * max(1.0, np.abs(s).max())
    # The report: the CLI's keys, computed on eval.
    for key in ["agreement", "stage_shares", "stage_agreement", "accuracy_compiled"]:
        assert g.report[key] == other.report[key], key
    assert g.report["evaluated_on"] == "eval"
    # f32 scoring stays near f64; pickling keeps the model.
    s32, _ = g.decision_with_stage(x, f32=True)
    assert np.abs(s32 - s).max() <= 1e-3 * max(1.0, np.abs(s).max())
    back = pickle.loads(pickle.dumps(g))
    assert np.array_equal(back.decision(x), s)
    assert g.compact.features == 64 and g.exact.n_support_vectors == exact.n_support_vectors
    info = kp.export(g, "onnx", tmp_path / "g.onnx")
    assert any("guard" in line for line in info["steps"])
    with pytest.raises(kp.Error):
        kp.guard(c, exact, str(calib), agreement=1.5)
    with pytest.raises(kp.Error):
        kp.guard(c, exact, str(calib))

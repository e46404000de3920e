//! Compiled models as programs: every method's file scored by a numpy scorer written from the
//! README's description of the format alone, version-1 files still loading and scoring the
//! same, and loading that recomputes nothing.

mod common;
use common::*;
use kernelpress::model::{AnyModel, CompiledModel, ExactModel};
use kernelpress::program::Step;

/// `score` the model on `test`, then rescore it in numpy from the README's description.
fn check_with_readme_scorer(
    dir: &std::path::Path,
    model: &std::path::Path,
    test: &std::path::Path,
) {
    let sc = dir.join(format!(
        "{}.csv",
        model.file_stem().unwrap().to_string_lossy()
    ));
    ok(&[
        "score",
        "--decisions",
        s(model),
        "--data",
        s(test),
        "--target",
        "condition",
        "--out",
        s(&sc),
    ]);
    let out = py(
        "score_from_format_page.py",
        &[s(model), s(test), "condition", s(&sc)],
    );
    eprint!("{out}");
}

#[test]
fn every_method_scores_the_same_from_the_readme_description() {
    let dir = tmpdir("every_method_scores_the_same_from_the_readme_description");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 1200);
    let train = dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 800);
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 300);
    let exact = root().join("models/pump_svm.safetensors");
    // The exact model itself.
    check_with_readme_scorer(&dir, &exact, &test);
    // Teacher mode: every method that serves the Gaussian kernel.
    for (method, features, extra) in [
        ("fourier", "256", vec![]),
        ("fourier", "200", vec!["--variant", "phase"]),
        ("orthogonal", "256", vec![]),
        ("hadamard", "200", vec![]),
        ("fastfood", "200", vec!["--variant", "phase"]),
        ("quasi", "256", vec!["--sequence", "sobol"]),
        ("nystrom", "128", vec![]),
        ("taylor", "495", vec![]),
        // Refined: continuous diagonals, learned phases, moved landmarks.
        ("hadamard", "200", vec!["--refine", "2"]),
        (
            "fastfood",
            "200",
            vec![
                "--variant",
                "phase",
                "--refine",
                "2",
                "--no-bandwidth-search",
            ],
        ),
        ("nystrom", "128", vec!["--refine", "2"]),
    ] {
        let out = dir.join(format!("t_{method}_{}.safetensors", extra.len()));
        let mut args = vec![
            "compile",
            s(&exact),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            method,
            "--features",
            features,
            "--seed",
            "5",
            "--no-timing",
            "--out",
            s(&out),
        ];
        args.extend(extra);
        ok(&args);
        check_with_readme_scorer(&dir, &out, &test);
    }
    // Labels mode: the methods of the other kernels, and composite kernels.
    for (kernel, method) in [
        ("polynomial(degree=3, gamma=0.2, offset=1)", "maclaurin"),
        ("polynomial(degree=2, gamma=0.3, offset=1)", "tensorsketch"),
        ("arccos(order=0)", "relu"),
        ("arccos(order=1)", "relu"),
        ("linear()", "identity"),
        ("gaussian(gamma=0.2) + 0.5 * linear()", "fourier"),
        ("gaussian(gamma=0.2) * linear()", "fourier"),
        ("2 * laplacian(lengthscale=3)", "quasi"),
        (
            "matern(nu=2.5, lengthscale=2) + rational_quadratic(alpha=2, lengthscale=3)",
            "orthogonal",
        ),
        (
            "sigmoid(gamma=0.05, offset=0) + gaussian(gamma=0.1)",
            "nystrom",
        ),
        ("gaussian(lengthscale=[1, 2, 1, 2, 1, 2, 1, 2])", "taylor"),
    ] {
        let out = dir.join(format!("l_{method}_{}.safetensors", kernel.len()));
        ok(&[
            "compile",
            "--kernel",
            kernel,
            "--data",
            s(&train),
            "--target",
            "condition",
            "--standardize",
            "--method",
            method,
            "--features",
            "200",
            "--seed",
            "9",
            "--out",
            s(&out),
        ]);
        check_with_readme_scorer(&dir, &out, &test);
    }
}

#[test]
fn version_1_files_load_and_score_the_same() {
    // The demo's version-1 files (kept as fixtures) against version-2 files: the exact model
    // is the same SMO solution as the demo's; the compiled one is rewritten as version 2.
    let dir = tmpdir("version_1_files_load_and_score_the_same");
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 500);
    let fx = root().join("tests/fixtures/v1");
    let (old_e, f) = AnyModel::load(&fx.join("pump_svm.safetensors")).unwrap();
    assert_eq!(f.version(), 1);
    let new_e = ExactModel::load(&root().join("models/pump_svm.safetensors")).unwrap();
    let t = kernelpress::data::read_table(&test, Some("condition"), false).unwrap();
    let a = old_e.decision(t.x.view());
    let b = new_e.decision(t.x.view());
    assert_eq!(a, b, "exact v1 vs v2");
    // The compiled fixture, read as version 1 and written again as version 2, scores the
    // same. (The demo's compiled model itself is no longer the same fit: distillation now
    // keeps the audit rows out.)
    let old_c = CompiledModel::load(&fx.join("pump_compiled.safetensors")).unwrap();
    let v2 = dir.join("v2.safetensors");
    old_c.save(&v2).unwrap();
    let new_c = CompiledModel::load(&v2).unwrap();
    assert_eq!(
        kernelpress::model::TensorFile::read(&v2).unwrap().version(),
        2
    );
    assert!(old_c.is_folded() && new_c.is_folded());
    assert_eq!(old_c.features(), new_c.features());
    let a = old_c.decision(t.x.view());
    let b = new_c.decision(t.x.view());
    let scale = a.iter().fold(1.0f64, |m, v| m.max(v.abs()));
    let worst = (&a - &b).iter().fold(0.0f64, |m, v| m.max(v.abs()));
    assert!(worst < 1e-9 * scale, "compiled v1 vs v2: {worst}");
    assert_eq!(old_c.labels_of(a.view()), new_c.labels_of(b.view()));
    // The CLI reads both.
    let o = ok(&["inspect", s(&fx.join("pump_compiled.safetensors"))]);
    assert!(
        o.contains("format version 1") && o.contains("kernel_block"),
        "{o}"
    );
}

#[test]
fn loading_a_nystrom_file_recomputes_nothing() {
    // A Nyström file holds its landmarks and the head folded into them: the program is one
    // kernel_block step. Duplicating a landmark makes K(L, L) singular, which a loader that
    // re-ran the eigendecomposition (and checked the rank) would refuse; this one scores it
    // exactly as K(x, L)·F + b.
    let dir = tmpdir("loading_a_nystrom_file_recomputes_nothing");
    let m = CompiledModel::load(&root().join("models/pump_compiled.safetensors")).unwrap();
    assert_eq!(m.program().len(), 1);
    let Step::KernelBlock(kb) = &m.program().instrs()[0].step else {
        panic!("expected a kernel block")
    };
    assert_eq!(kb.landmarks().nrows(), m.head().nrows());
    let mut f = m.to_file();
    let t = f.tensors.get_mut("step0.landmarks").unwrap();
    let kernelpress::format::Data::F64(v) = &mut t.data else {
        panic!()
    };
    let d = t.shape[1];
    let first: Vec<f64> = v[..d].to_vec();
    v[d..2 * d].copy_from_slice(&first);
    let p = dir.join("dup.safetensors");
    f.write(&p).unwrap();
    let back = CompiledModel::load(&p).unwrap();
    let x = ndarray::Array2::from_shape_fn((3, d), |(i, j)| (i + j) as f64 * 0.1);
    let Step::KernelBlock(kb2) = &back.program().instrs()[0].step else {
        panic!()
    };
    let k = kb2.kernel().gram(
        back.scaling().unwrap().apply(x.view()).view(),
        kb2.landmarks().view(),
    );
    let want = k.dot(&back.head()) + &ndarray::Array1::from(back.intercept().to_vec());
    let got = back.decision(x.view());
    assert!((&want - &got).iter().all(|e| e.abs() < 1e-10));
}

#[test]
fn inspect_prints_the_program() {
    let dir = tmpdir("inspect_prints_the_program");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 300);
    let out = dir.join("h.safetensors");
    ok(&[
        "compile",
        s(&root().join("models/pump_svm.safetensors")),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "64",
        "--no-timing",
        "--out",
        s(&out),
    ]);
    let o = ok(&["inspect", s(&out)]);
    let ops: Vec<&str> = o
        .lines()
        .filter(|l| l.trim_start().starts_with('v'))
        .filter_map(|l| l.split_whitespace().nth(2))
        .collect();
    assert_eq!(
        ops,
        [
            "scale", "pad", "tile", "signs", "wht", "signs", "wht", "signs", "wht", "times",
            "cos_sin"
        ],
        "{o}"
    );
    assert!(o.contains("step3.signs") && o.contains("I8"), "{o}");
    let j: serde_json::Value = serde_json::from_str(&ok(&["inspect", s(&out), "--json"])).unwrap();
    assert_eq!(j["manifest"]["format_version"], 2);
    assert_eq!(j["tensors"]["head.weights"]["dtype"], "F64");
}

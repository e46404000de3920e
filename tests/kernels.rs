//! Kernel values and Gram spectra against numpy/scipy and the published check values.

mod common;
use common::*;
use kernelpress::data::write_npy_f64;
use kernelpress::kernel::Kernel;
use ndarray::Array2;
use serde_json::json;

fn pts(n: usize, d: usize, salt: f64) -> Array2<f64> {
    Array2::from_shape_fn((n, d), |(i, j)| {
        ((i * d + j) as f64 * 0.7 + salt).sin() * 1.3
    })
}

#[test]
fn gram_blocks_match_scipy() {
    let dir = tmpdir("gram_blocks_match_scipy");
    let a = pts(40, 3, 0.1);
    let b = pts(25, 3, 2.0);
    write_npy_f64(&dir.join("a.npy"), &[40, 3], a.as_slice().unwrap()).unwrap();
    write_npy_f64(&dir.join("b.npy"), &[25, 3], b.as_slice().unwrap()).unwrap();
    let cases = vec![
        (
            "gaussian(gamma=0.7)",
            json!({"name": "gaussian", "gamma": 0.7}),
        ),
        (
            "gaussian(lengthscale=[1, 2, 0.5])",
            json!({"name": "gaussian_ls", "lengthscale": [1, 2, 0.5]}),
        ),
        (
            "laplacian(gamma=0.3)",
            json!({"name": "laplacian", "gamma": 0.3}),
        ),
        (
            "matern(nu=0.5, lengthscale=0.8)",
            json!({"name": "matern", "nu": 0.5, "lengthscale": 0.8}),
        ),
        (
            "matern(nu=1.5, lengthscale=0.8)",
            json!({"name": "matern", "nu": 1.5, "lengthscale": 0.8}),
        ),
        (
            "matern(nu=2.5, lengthscale=1.7)",
            json!({"name": "matern", "nu": 2.5, "lengthscale": 1.7}),
        ),
        (
            "rational_quadratic(alpha=0.7, lengthscale=1.5)",
            json!({"name": "rational_quadratic", "alpha": 0.7, "lengthscale": 1.5}),
        ),
        (
            "polynomial(degree=3, gamma=0.5, offset=1)",
            json!({"name": "polynomial", "degree": 3, "gamma": 0.5, "coef0": 1.0}),
        ),
        (
            "sigmoid(gamma=0.2, offset=-0.3)",
            json!({"name": "sigmoid", "gamma": 0.2, "coef0": -0.3}),
        ),
        ("arccos(order=0)", json!({"name": "arccos", "order": 0})),
        ("arccos(order=1)", json!({"name": "arccos", "order": 1})),
        ("linear()", json!({"name": "linear"})),
        (
            "2.5 * gaussian(gamma=1) + linear() * matern(nu=1.5, lengthscale=2)",
            json!({"name": "sum", "parts": [
                {"name": "scaled", "c": 2.5, "inner": {"name": "gaussian", "gamma": 1.0}},
                {"name": "product", "parts": [{"name": "linear"}, {"name": "matern", "nu": 1.5, "lengthscale": 2.0}]}
            ]}),
        ),
    ];
    let mut list = Vec::new();
    for (i, (expr, spec)) in cases.iter().enumerate() {
        let k: Kernel = expr.parse().unwrap();
        let g = k.gram(a.view(), b.view());
        let f = dir.join(format!("g{i}.npy"));
        write_npy_f64(&f, &[40, 25], g.as_slice().unwrap()).unwrap();
        list.push(json!({"expr": expr, "spec": spec, "gram": s(&f)}));
    }
    let cfg = json!({"a": s(&dir.join("a.npy")), "b": s(&dir.join("b.npy")), "cases": list});
    std::fs::write(dir.join("cases.json"), cfg.to_string()).unwrap();
    let out = py("kernels.py", &[s(&dir.join("cases.json"))]);
    assert!(out.contains("worst"), "{out}");
}

fn kernel_check_json(args: &[&str]) -> serde_json::Value {
    let mut a = vec!["kernel-check", "--json"];
    a.extend_from_slice(args);
    serde_json::from_str(&ok(&a)).unwrap()
}

#[test]
fn kernel_check_matches_numpy_eigvalsh() {
    let dir = tmpdir("kernel_check_matches_numpy_eigvalsh");
    let x = pts(120, 3, 0.4);
    let rows: Vec<Vec<f64>> = x.rows().into_iter().map(|r| r.to_vec()).collect();
    let csv = dir.join("p.csv");
    write_csv(&csv, &["a", "b", "c"], &rows, None);
    for (expr, spec, want_psd) in [
        (
            "gaussian(gamma=0.5)",
            json!({"name": "gaussian", "gamma": 0.5}),
            true,
        ),
        (
            "matern(nu=1.5, lengthscale=1)",
            json!({"name": "matern", "nu": 1.5, "lengthscale": 1.0}),
            true,
        ),
        // tanh(γ x·y + c) with c < 0 is not positive semidefinite (common practice; the
        // ONNX-ML SIGMOID kernel is the same function).
        (
            "sigmoid(gamma=1, offset=-1)",
            json!({"name": "sigmoid", "gamma": 1.0, "coef0": -1.0}),
            false,
        ),
    ] {
        let v = kernel_check_json(&["--kernel", expr, "--data", s(&csv)]);
        let out = dir.join("check.json");
        std::fs::write(&out, v.to_string()).unwrap();
        py("gram_eig.py", &[s(&csv), &spec.to_string(), s(&out)]);
        assert_eq!(v["psd"].as_bool().unwrap(), want_psd, "{expr}: {v}");
        if !want_psd {
            assert!(v["negative_count"].as_u64().unwrap() > 0);
        }
    }
}

#[test]
fn kernel_check_reference_spectra() {
    let dir = tmpdir("kernel_check_reference_spectra");
    // Gaussian σ=1 (γ=½) Gram on {0,1} is [[1, e^{−½}], [e^{−½}, 1]]: eigenvalues 1 ± e^{−½}.
    let p = dir.join("two.csv");
    std::fs::write(&p, "x\n0\n1\n").unwrap();
    let v = kernel_check_json(&["--kernel", "gaussian(gamma=0.5)", "--data", s(&p)]);
    assert!((v["max_eigenvalue"].as_f64().unwrap() - 1.6065307).abs() < 1e-7);
    assert!((v["min_eigenvalue"].as_f64().unwrap() - 0.3934693).abs() < 1e-7);
    // {0,1,2}: 1.9280965, 1 − e⁻² = 0.8646647, 0.2072388.
    let p = dir.join("three.csv");
    std::fs::write(&p, "x\n0\n1\n2\n").unwrap();
    let v = kernel_check_json(&["--kernel", "gaussian(lengthscale=1)", "--data", s(&p)]);
    let ev: Vec<f64> = v["smallest_eigenvalues"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect();
    for (g, w) in ev.iter().zip([0.2072388, 0.8646647, 1.9280965]) {
        assert!((g - w).abs() < 1e-7, "{ev:?}");
    }
    // Linear Gram of (1,0),(0,1),(1,1): eigenvalues 3, 1, 0 — PSD with a zero eigenvalue.
    let p = dir.join("lin.csv");
    std::fs::write(&p, "a,b\n1,0\n0,1\n1,1\n").unwrap();
    let v = kernel_check_json(&["--kernel", "linear()", "--data", s(&p)]);
    assert!((v["max_eigenvalue"].as_f64().unwrap() - 3.0).abs() < 1e-12);
    assert!(v["min_eigenvalue"].as_f64().unwrap().abs() < 1e-12);
    assert!(v["psd"].as_bool().unwrap());
}

#[test]
fn kernel_check_draws_points_deterministically() {
    let a = ok(&[
        "kernel-check",
        "--kernel",
        "laplacian(gamma=1)",
        "--dim",
        "4",
        "--points",
        "60",
        "--seed",
        "3",
        "--json",
    ]);
    let b = ok(&[
        "kernel-check",
        "--kernel",
        "laplacian(gamma=1)",
        "--dim",
        "4",
        "--points",
        "60",
        "--seed",
        "3",
        "--json",
    ]);
    assert_eq!(a, b);
    let v: serde_json::Value = serde_json::from_str(&a).unwrap();
    assert!(v["psd"].as_bool().unwrap());
    let text = ok(&[
        "kernel-check",
        "--kernel",
        "sigmoid(gamma=2, offset=-1)",
        "--dim",
        "3",
    ]);
    assert!(text.contains("NOT positive semidefinite"), "{text}");
}

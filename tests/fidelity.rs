//! Fidelity levers: the map bandwidth (a map at m× a Gaussian's bandwidth approximates the
//! Gaussian with γ·m, by the kernel's definition), the bandwidth search recorded in files
//! and reports, audit rows kept out of the fit, and support-vector landmarks.

mod common;

use common::*;
use kernelpress::features::{FeatureSpec, Landmarks, Method};
use kernelpress::fit::{audit_row, row_part, Part, RidgeGrid, Teacher, BANDWIDTH_MULTIPLES};
use kernelpress::model::CompiledModel;
use kernelpress::observe::Silent;
use ndarray::Array2;

/// A Gaussian map at 0.5× the bandwidth reproduces exp(−0.5·γ‖x − y‖²) (the Gaussian
/// kernel's definition), not exp(−γ‖x − y‖²): with 40,000 orthogonal features the Gram
/// error is about D^(−1/2) ≈ 0.005, far below the gap between the two kernels.
#[test]
fn a_scaled_map_approximates_the_kernel_at_the_scaled_bandwidth() {
    let gamma = 0.3;
    let x = Array2::from_shape_fn((40, 4), |(i, j)| ((i * 4 + j) as f64 * 0.77).sin() * 1.5);
    let mut spec = FeatureSpec::new(
        format!("gaussian(gamma={gamma})").parse().unwrap(),
        Method::Orthogonal,
        4,
        40_000,
        9,
    );
    spec.options.map_bandwidth = 0.5;
    let z = spec.sample(None).unwrap().0.transform(x.view());
    let g = z.dot(&z.t());
    let (mut err_scaled, mut gap) = (0.0f64, 0.0f64);
    for i in 0..x.nrows() {
        for j in 0..x.nrows() {
            let d2: f64 = x
                .row(i)
                .iter()
                .zip(x.row(j))
                .map(|(a, b)| (a - b) * (a - b))
                .sum();
            let want = (-0.5 * gamma * d2).exp();
            let other = (-gamma * d2).exp();
            err_scaled = err_scaled.max((g[[i, j]] - want).abs());
            gap = gap.max((want - other).abs());
        }
    }
    assert!(err_scaled < 0.03, "max error {err_scaled}");
    assert!(gap > 0.2, "the two kernels should differ ({gap})");
    // The spec records the multiple and reads it back; other methods refuse it.
    let back = FeatureSpec::from_json(&spec.to_json()).unwrap();
    assert_eq!(back.options.map_bandwidth, 0.5);
    let mut bad = spec.clone();
    bad.method = Method::Nystrom;
    assert!(bad.validate().is_err());
}

#[test]
fn audit_rows_never_enter_the_fit() {
    assert!(audit_row(9) && audit_row(19) && !audit_row(4) && !audit_row(0));
    let parts: Vec<Part> = (0..20).map(row_part).collect();
    assert_eq!(parts.iter().filter(|p| **p == Part::Skip).count(), 2);
    assert_eq!(parts.iter().filter(|p| **p == Part::Choose).count(), 2);
    // Changing only the audit rows' targets leaves the fitted head unchanged.
    let exact = demo_exact();
    let x = demo_rows("pump_calib.csv");
    let x = x.slice(ndarray::s![..1000, ..]).to_owned();
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::Fourier,
        exact.input_dim(),
        64,
        2,
    );
    let t = Teacher::new(&exact, x.view(), &Silent).unwrap();
    let (a, _) = t
        .distil(&spec, &RidgeGrid::standard(), None, &Silent)
        .unwrap();
    let mut x2 = x.clone();
    for i in (0..x2.nrows()).filter(|&i| audit_row(i)) {
        x2.row_mut(i).mapv_inplace(|v| v * 3.0 + 1.0);
    }
    let t2 = Teacher::new(&exact, x2.view(), &Silent).unwrap();
    let (b, _) = t2
        .distil(&spec, &RidgeGrid::standard(), None, &Silent)
        .unwrap();
    assert_eq!(a.head(), b.head());
    assert_eq!(a.intercept(), b.intercept());
}

#[test]
fn support_vector_landmarks_come_from_the_teacher() {
    let exact = demo_exact();
    let x = demo_rows("pump_calib.csv");
    let x = x.slice(ndarray::s![..600, ..]).to_owned();
    let t = Teacher::new(&exact, x.view(), &Silent).unwrap();
    let mut spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::Nystrom,
        exact.input_dim(),
        50,
        1,
    );
    spec.options.landmarks = Landmarks::Support;
    let (m, _) = t
        .distil(&spec, &RidgeGrid::standard(), None, &Silent)
        .unwrap();
    // The folded program is one kernel block whose landmarks are the 50 support vectors of
    // largest total |coefficient|, in that order.
    let w: Vec<f64> = exact
        .coef()
        .rows()
        .into_iter()
        .map(|r| r.iter().map(|c| c.abs()).sum())
        .collect();
    let mut order: Vec<usize> = (0..w.len()).collect();
    order.sort_by(|&a, &b| w[b].total_cmp(&w[a]).then(a.cmp(&b)));
    let file = m.to_file();
    let l = file
        .f64(
            "step0.landmarks",
            &[Some(50), Some(exact.input_dim())],
            "mem",
        )
        .unwrap();
    for (r, &i) in order[..50].iter().enumerate() {
        let row = &l[r * exact.input_dim()..(r + 1) * exact.input_dim()];
        assert_eq!(row, exact.support_vectors().row(i).as_slice().unwrap());
    }
    assert_eq!(m.spec().to_json()["landmarks"], "support");
}

#[test]
fn the_bandwidth_search_is_recorded_and_can_be_switched_off() {
    let d = tmpdir("bandwidth_search");
    let calib = d.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 2000);
    let model = root().join("models/pump_svm.safetensors");
    let run_one = |extra: &[&str], name: &str| -> (CompiledModel, serde_json::Value) {
        let out = d.join(name);
        let json = d.join(format!("{name}.json"));
        let mut args = vec![
            "compile",
            s(&model),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            "hadamard",
            "--features",
            "256",
            "--no-timing",
            "--out",
            s(&out),
            "--json",
            s(&json),
        ];
        args.extend_from_slice(extra);
        ok(&args);
        let r = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
        (CompiledModel::load(&out).unwrap(), r)
    };
    let (m, r) = run_one(&[], "tuned.safetensors");
    let tried = m.fit["bandwidth_search"]["tried"].as_array().unwrap();
    assert_eq!(tried.len(), BANDWIDTH_MULTIPLES.len());
    assert_eq!(
        r["map_bandwidth"].as_f64().unwrap(),
        m.spec().options.map_bandwidth
    );
    assert!(BANDWIDTH_MULTIPLES.contains(&m.spec().options.map_bandwidth));
    let (m0, r0) = run_one(&["--no-bandwidth-search"], "plain.safetensors");
    assert!(m0.fit.get("bandwidth_search").is_none());
    assert_eq!(r0["map_bandwidth"].as_f64().unwrap(), 1.0);
    // The numpy scorer written from the README scores the tuned file too.
    let test = d.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 200);
    let sc = ok(&[
        "score",
        "--decisions",
        s(&d.join("tuned.safetensors")),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let pred = d.join("pred.csv");
    std::fs::write(&pred, sc).unwrap();
    py(
        "score_from_format_page.py",
        &[
            s(&d.join("tuned.safetensors")),
            s(&test),
            "condition",
            s(&pred),
        ],
    );
}

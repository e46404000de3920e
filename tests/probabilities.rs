//! Class probabilities: Platt's sigmoid fit against scipy's optimiser on the same
//! likelihood (Platt 1999; the stable Newton fit of Lin, Lin & Weng 2007), pairwise
//! coupling against scipy's solution of Wu, Lin & Weng's (2004) method 2, imported ONNX
//! SVMs with `prob_a`/`prob_b` against onnxruntime, and the CLI end to end on the demo.

mod common;
use common::*;
use kernelpress::model::{couple, platt_fit};
use ndarray::Array2;

/// A deterministic pseudo-random stream in [0, 1) (no generator crate needed).
fn stream(seed: u64) -> impl FnMut() -> f64 {
    let mut s = seed;
    move || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn platt_fit_matches_scipy_on_the_same_likelihood() {
    let dir = tmpdir("platt_fit_matches_scipy");
    for (case, (n, slope, noise)) in [(400, 2.0, 0.8), (60, 0.7, 1.5), (1000, 4.0, 0.2)]
        .into_iter()
        .enumerate()
    {
        let mut u = stream(case as u64 + 1);
        let mut f = Vec::new();
        let mut y = Vec::new();
        for _ in 0..n {
            let d = 4.0 * u() - 2.0;
            // Outcome: positive with a logistic probability in d, plus noise in the decision.
            let p = 1.0 / (1.0 + (-slope * d).exp());
            y.push(u() < p);
            f.push(d + noise * (u() - 0.5));
        }
        let (a, b) = platt_fit(&f, &y);
        let p = dir.join(format!("f{case}.csv"));
        let text: String = f
            .iter()
            .zip(&y)
            .map(|(f, y)| format!("{f:?},{}\n", u8::from(*y)))
            .collect();
        std::fs::write(&p, text).unwrap();
        let out = py("probabilities.py", &["platt", s(&p)]);
        let v: Vec<f64> = out.split_whitespace().map(|t| t.parse().unwrap()).collect();
        assert!(
            a < 0.0,
            "a larger decision makes the positive side likelier: {a}"
        );
        assert!(
            (a - v[0]).abs() < 1e-5 * v[0].abs().max(1.0)
                && (b - v[1]).abs() < 1e-5 * v[1].abs().max(1.0),
            "case {case}: ours ({a}, {b}), scipy ({}, {})",
            v[0],
            v[1]
        );
    }
}

#[test]
fn coupling_matches_scipy_on_inconsistent_pairs() {
    let dir = tmpdir("coupling_matches_scipy");
    let mut u = stream(99);
    let mut ours = Vec::new();
    for k in [3usize, 4, 5, 4] {
        let mut r = Array2::zeros((k, k));
        for i in 0..k {
            for j in i + 1..k {
                let v = 0.02 + 0.96 * u();
                r[[i, j]] = v;
                r[[j, i]] = 1.0 - v;
            }
        }
        ours.push(couple(&r));
        // Each case to its own file, read by scipy.
        let p = dir.join(format!("r{k}_{}.csv", ours.len()));
        let sq: String = (0..k)
            .map(|i| {
                (0..k)
                    .map(|j| format!("{:?}", r[[i, j]]))
                    .collect::<Vec<_>>()
                    .join(",")
                    + "\n"
            })
            .collect();
        std::fs::write(&p, sq).unwrap();
        let out = py("probabilities.py", &["couple", s(&p)]);
        let want: Vec<f64> = out.split_whitespace().map(|t| t.parse().unwrap()).collect();
        let got = ours.last().unwrap();
        assert!((got.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        for (g, w) in got.iter().zip(&want) {
            assert!(
                (g - w).abs() < 1e-5,
                "k = {k}: ours {got:?}, scipy {want:?}"
            );
        }
    }
    assert_eq!(ours.len(), 4);
}

#[test]
fn imported_onnx_probabilities_match_onnxruntime() {
    let dir = tmpdir("imported_onnx_probabilities_match_onnxruntime");
    py("probabilities.py", &["onnx", s(&dir)]);
    for k in [2usize, 3, 4] {
        let m = dir.join(format!("m{k}.safetensors"));
        ok(&[
            "import",
            "--onnx",
            s(&dir.join(format!("prob{k}.onnx"))),
            "--out",
            s(&m),
        ]);
        let x = dir.join(format!("prob{k}_x.csv"));
        let out = ok(&["score", s(&m), "--data", s(&x), "--probabilities"]);
        let mut lines = out.lines();
        let head: Vec<&str> = lines.next().unwrap().split(',').collect();
        let want = std::fs::read_to_string(dir.join(format!("prob{k}_prob.csv"))).unwrap();
        let mut worst = 0.0f64;
        for (line, w) in lines.zip(want.lines()) {
            let cells: Vec<&str> = line.split(',').collect();
            let w: Vec<f64> = w.split(',').map(|t| t.parse().unwrap()).collect();
            for (c, wc) in w.iter().enumerate() {
                // onnxruntime's columns follow its class labels c0, c1, …
                let col = head
                    .iter()
                    .position(|h| *h == format!("prob_c{c}"))
                    .unwrap();
                let g: f64 = cells[col].parse().unwrap();
                worst = worst.max((g - wc).abs());
            }
        }
        // onnxruntime computes in f32 and stops its coupling iteration (binary models too)
        // once the optimality residual is below 0.005/k (libsvm's rule, from memory),
        // measured here at up to 3.5e-3 from the exact solution; we solve the system
        // exactly. A wrong sign, pair order or class order moves probabilities by far more.
        assert!(worst < 1e-2, "{k} classes: largest difference {worst}");
        assert!(worst > 0.0, "{k} classes: compared nothing");
    }
}

#[test]
fn compile_fits_probabilities_from_labelled_rows_and_reports_them() {
    let dir = tmpdir("compile_fits_probabilities");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 1000);
    let out = dir.join("c.safetensors");
    let rep = dir.join("r.json");
    let text = ok(&[
        "compile",
        s(&root().join("models/pump_svm.safetensors")),
        "--calib",
        s(&calib),
        "--eval",
        s(&test),
        "--target",
        "condition",
        "--method",
        "nystrom",
        "--features",
        "256",
        "--no-timing",
        "--out",
        s(&out),
        "--json",
        s(&rep),
    ]);
    assert!(text.contains("class probabilities"), "{text}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
    let ll = r["probabilities"]["log_loss"].as_f64().unwrap();
    // Better than a uniform guess over four classes (ln 4 = 1.386), and the Brier score
    // below a uniform guess's 0.75.
    assert!(ll < 4f64.ln() - 0.3, "log loss {ll}");
    assert!(r["probabilities"]["brier"].as_f64().unwrap() < 0.6);
    let sc = ok(&[
        "score",
        s(&out),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--probabilities",
    ]);
    let mut lines = sc.lines();
    let head: Vec<&str> = lines.next().unwrap().split(',').collect();
    let pcols: Vec<usize> = (0..head.len())
        .filter(|&i| head[i].starts_with("prob_"))
        .collect();
    assert_eq!(pcols.len(), 4);
    let truth = kernelpress::data::read_table(&test, Some("condition"), true).unwrap();
    let labels: Vec<&str> = pcols.iter().map(|&i| &head[i][5..]).collect();
    let mut nll = 0.0;
    let mut n = 0;
    for (line, t) in lines.zip(truth.target.unwrap()) {
        let c: Vec<&str> = line.split(',').collect();
        let p: Vec<f64> = pcols.iter().map(|&i| c[i].parse().unwrap()).collect();
        assert!((p.iter().sum::<f64>() - 1.0).abs() < 1e-9);
        let j = labels.iter().position(|l| *l == t).unwrap();
        nll -= p[j].max(1e-15).ln();
        n += 1;
    }
    // The report's log loss is the mean over the same rows, recomputed from score's output.
    assert!(
        (nll / n as f64 - ll).abs() < 1e-9,
        "{} vs {ll}",
        nll / n as f64
    );
    // A model without a calibration refuses --probabilities (exit 2, one line).
    let e = bad(&[
        "score",
        s(&root().join("models/pump_svm.safetensors")),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--probabilities",
    ]);
    assert!(e.contains("no probability calibration"), "{e}");
}

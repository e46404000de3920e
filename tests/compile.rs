//! compile → report → score end to end, the distillation's exactness on a teacher that is
//! linear in the features, and numpy recomputations of compiled models and reports.

mod common;
use common::*;
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
use kernelpress::model::{ExactModel, Task};
use ndarray::Array2;

#[test]
fn compile_report_score_agree_and_match_numpy() {
    let dir = tmpdir("compile_report_score_agree_and_match_numpy");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 2000);
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 600);
    let exact = root().join("models/pump_svm.safetensors");
    for (method, extra) in [
        ("orthogonal", vec![]),
        ("hadamard", vec![]),
        ("fastfood", vec!["--variant", "phase"]),
        ("nystrom", vec![]),
    ] {
        let out = dir.join(format!("c_{method}.safetensors"));
        let rep = dir.join(format!("r_{method}.json"));
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
            "256",
            "--seed",
            "3",
            "--no-timing",
            "--out",
            s(&out),
        ];
        args.extend(extra);
        ok(&args);
        ok(&[
            "report",
            s(&out),
            "--exact",
            s(&exact),
            "--data",
            s(&test),
            "--target",
            "condition",
            "--reps",
            "30",
            "--json",
            s(&rep),
        ]);
        let sc = dir.join(format!("sc_{method}.csv"));
        let se = dir.join("se.csv");
        ok(&[
            "score",
            "--decisions",
            s(&out),
            "--data",
            s(&test),
            "--target",
            "condition",
            "--out",
            s(&sc),
        ]);
        ok(&[
            "score",
            "--decisions",
            s(&exact),
            "--data",
            s(&test),
            "--target",
            "condition",
            "--out",
            s(&se),
        ]);
        py(
            "compiled_check.py",
            &[s(&out), s(&test), "condition", s(&sc), s(&se), s(&rep)],
        );
        let r: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
        for key in [
            "method",
            "features",
            "seed",
            "kernel_max_abs_error",
            "kernel_rmse",
            "gram_rel_frobenius_error",
            "decision_rmse",
            "decision_r2",
            "decision_max_abs_error",
            "agreement",
            "agreement_ci95",
            "accuracy_exact",
            "accuracy_compiled",
            "bytes_exact",
            "bytes_compiled",
            "flops_exact",
            "flops_compiled",
            "latency_us_exact_p50",
            "latency_us_compiled_p50",
            "latency_us_compiled_p99",
            "throughput_rows_per_s_exact",
            "throughput_rows_per_s_compiled",
            "speedup_single",
            "speedup_batch",
            "n_rows",
        ] {
            assert!(r.get(key).is_some(), "{method}: report lacks {key}");
        }
        // Timings are measured numbers: finite and positive, never null.
        for key in [
            "latency_us_exact_p50",
            "latency_us_compiled_p50",
            "latency_us_compiled_p99",
            "throughput_rows_per_s_exact",
            "throughput_rows_per_s_compiled",
            "speedup_single",
            "speedup_batch",
            "latency_us_compiled_f32_p50",
            "agreement_f32",
            "throughput_rows_per_s_exact_f32",
            "throughput_rows_per_s_compiled_f32",
            "speedup_batch_f32",
            "agreement_f32_batch",
            "agreement_exact_f32_batch",
        ] {
            let v = r[key].as_f64();
            assert!(
                v.is_some_and(|v| v.is_finite() && v > 0.0),
                "{method}: {key} is {}",
                r[key]
            );
        }
        assert!(
            r["agreement"].as_f64().unwrap() > 0.9,
            "{method}: {}",
            r["agreement"]
        );
        assert!(
            r["decision_r2"].as_f64().unwrap() > 0.9,
            "{method}: {}",
            r["decision_r2"]
        );
    }
}

#[test]
fn report_measures_latency_and_warns_below_tolerance() {
    let dir = tmpdir("report_measures_latency_and_warns_below_tolerance");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 1000);
    let exact = root().join("models/pump_svm.safetensors");
    let out = dir.join("tiny.safetensors");
    let rep = dir.join("r.json");
    let o = run(&[
        "compile",
        s(&exact),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "8",
        "--out",
        s(&out),
        "--report",
        s(&rep),
    ]);
    assert!(o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("warning: label agreement"), "{err}");
    // Each warning once, on stderr only, in lower case (no shouting, no second copy).
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(!stdout.to_lowercase().contains("warning"), "{stdout}");
    assert_eq!(err.matches("warning: label agreement").count(), 1, "{err}");
    for line in err.lines().filter(|l| l.starts_with("warning: ")) {
        assert_eq!(err.matches(line).count(), 1, "repeated: {line}\n{err}");
    }
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
    assert_eq!(r["agreement_below_min"], true);
    assert!(r["latency_us_compiled_p50"].as_f64().unwrap() > 0.0);
    assert!(
        r["latency_us_compiled_p99"].as_f64().unwrap()
            >= r["latency_us_compiled_p50"].as_f64().unwrap()
    );
    assert!(r["throughput_rows_per_s_exact"].as_f64().unwrap() > 0.0);
    let text = ok(&[
        "report",
        s(&out),
        "--exact",
        s(&exact),
        "--data",
        s(&calib),
        "--target",
        "condition",
        "--reps",
        "30",
        "--min-agreement",
        "0.5",
    ]);
    assert!(
        (text.contains("× faster") || text.contains("× slower") || text.contains("as fast"))
            && !text.to_lowercase().contains("warning"),
        "{text}"
    );
}

fn linear_teacher() -> (ExactModel, Array2<f64>) {
    let sv = Array2::from_shape_fn((5, 4), |(i, j)| ((i * 4 + j) as f64 * 0.7).sin());
    let coef = Array2::from_shape_fn((5, 2), |(i, j)| (i as f64 - 2.0) * (j as f64 + 0.5));
    let m = ExactModel::new(
        "linear()".parse().unwrap(),
        sv,
        coef,
        vec![0.3, -0.2],
        Task::Regression,
        vec![],
        None,
    )
    .unwrap();
    let x = Array2::from_shape_fn((400, 4), |(i, j)| {
        ((i * 4 + j) as f64 * 0.31 + (i * j * j) as f64 * 0.013).cos() * 2.0
    });
    (m, x)
}

#[test]
fn distillation_recovers_a_linear_teacher_exactly() {
    // A teacher that is itself linear in the features: f(x) = (SVᵀ coef)ᵀ x + b with the
    // identity map. Least squares with a negligible ridge must return W = SVᵀ coef and b.
    let (teacher, x) = linear_teacher();
    let spec = FeatureSpec::new("linear()".parse().unwrap(), Method::Identity, 4, 4, 0);
    let (m, _) = compile_exact(
        &teacher,
        Some(x.view()),
        &spec,
        HeadKind::Distill,
        &RidgeGrid::fixed(1e-12),
        None,
        &kernelpress::observe::Silent,
    )
    .unwrap();
    let want = teacher.support_vectors().t().dot(&teacher.coef());
    for (a, b) in m.head().iter().zip(want.iter()) {
        assert!((a - b).abs() < 1e-6, "{a} vs {b}");
    }
    assert!((m.intercept()[0] - 0.3).abs() < 1e-6 && (m.intercept()[1] + 0.2).abs() < 1e-6);
    // Nyström with the teacher's support vectors as landmarks spans the teacher exactly
    // (Williams & Seeger 2001): both distill and project reproduce its decisions.
    let sv = Array2::from_shape_fn((30, 3), |(i, j)| ((i * 3 + j) as f64 * 0.53).sin());
    let coef = Array2::from_shape_fn((30, 1), |(i, _)| ((i * 7) as f64).cos());
    let g = ExactModel::new(
        "gaussian(gamma=0.7)".parse().unwrap(),
        sv.clone(),
        coef,
        vec![0.1],
        Task::Regression,
        vec![],
        None,
    )
    .unwrap();
    let xc = Array2::from_shape_fn((500, 3), |(i, j)| {
        ((i * 3 + j) as f64 * 0.17 + (i * j * j) as f64 * 0.011).cos()
    });
    let spec = FeatureSpec::new(g.kernel().clone(), Method::Nystrom, 3, 30, 0);
    for kind in [HeadKind::Distill, HeadKind::Project] {
        let (m, _) = compile_exact(
            &g,
            Some(xc.view()),
            &spec,
            kind,
            &RidgeGrid::fixed(1e-13),
            Some(sv.view()),
            &kernelpress::observe::Silent,
        )
        .unwrap();
        let a = g.decision(xc.view());
        let b = m.decision(xc.view());
        let worst = (&a - &b).iter().fold(0.0f64, |w, v| w.max(v.abs()));
        assert!(worst < 1e-5, "{kind:?}: {worst}");
    }
}

#[test]
fn labels_mode_fits_without_a_teacher() {
    let dir = tmpdir("labels_mode_fits_without_a_teacher");
    let out = dir.join("direct.safetensors");
    let text = ok(&[
        "compile",
        "--kernel",
        "gaussian(gamma=0.25)",
        "--data",
        s(&root().join("models/pump_train.csv")),
        "--target",
        "condition",
        "--standardize",
        "--method",
        "orthogonal",
        "--features",
        "512",
        "--out",
        s(&out),
    ]);
    let acc: f64 = text
        .split("never fitted on) ")
        .nth(1)
        .unwrap()
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();
    // The exact SVM reaches 0.77 on test data; a 512-feature ridge fit should be close.
    assert!(acc > 0.7, "{text}");
    let sc = ok(&[
        "score",
        "--decisions",
        s(&out),
        "--data",
        s(&root().join("models/pump_test.csv")),
        "--target",
        "condition",
    ]);
    assert!(
        sc.starts_with(
            "label,margin,score_bearing_wear,score_healthy,score_imbalance,score_misalignment,decision_bearing_wear,decision_healthy,decision_imbalance,decision_misalignment\n"
        ),
        "{}",
        &sc[..80]
    );
    let info = ok(&["inspect", s(&out)]);
    assert!(
        info.contains("compiled") && info.contains("orthogonal"),
        "{info}"
    );
}

#[test]
fn compile_bad_input() {
    let dir = tmpdir("compile_bad_input");
    let exact = root().join("models/pump_svm.safetensors");
    let out = dir.join("c.safetensors");
    let e = bad(&[
        "compile",
        s(&exact),
        "--method",
        "fourier",
        "--features",
        "64",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("--calib"), "{e}");
    let wrong = dir.join("w.csv");
    std::fs::write(&wrong, "a,b\n1,2\n").unwrap();
    let e = bad(&[
        "compile",
        s(&exact),
        "--calib",
        s(&wrong),
        "--method",
        "fourier",
        "--features",
        "64",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("'vib_rms'") && e.contains("are missing"), "{e}");
    let e = bad(&[
        "compile",
        s(&exact),
        "--calib",
        s(&root().join("models/pump_calib.csv")),
        "--target",
        "condition",
        "--method",
        "tensorsketch",
        "--features",
        "64",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("methods that can"), "{e}");
    let e = bad(&[
        "report",
        s(&exact),
        "--exact",
        s(&exact),
        "--data",
        s(&wrong),
    ]);
    assert!(e.contains("expected a compiled model"), "{e}");
    assert!(!out.exists());
}

#[test]
fn compiled_files_are_bit_identical_across_thread_counts() {
    let dir = tmpdir("compiled_files_are_bit_identical_across_thread_counts");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let exact = root().join("models/pump_svm.safetensors");
    let compile =
        |method: &str, extra: &[&str], seed: &str, threads: &str, out: &std::path::Path| {
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
                "300",
                "--seed",
                seed,
                "--no-timing",
                "--out",
                s(out),
            ];
            args.extend(extra);
            let o = std::process::Command::new(bin())
                .args(&args)
                .env("RAYON_NUM_THREADS", threads)
                .output()
                .unwrap();
            assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
            std::fs::read(out).unwrap()
        };
    // Orthogonal with its bandwidth search (three fits, one kept); Fastfood without it but
    // with its head precision chosen on the ridge-choice rows (chosen by size, never by a
    // timing); Nyström's landmarks.
    for (method, extra) in [
        ("orthogonal", &[][..]),
        (
            "fastfood",
            &["--no-bandwidth-search", "--head-precision", "auto"][..],
        ),
        ("nystrom", &[][..]),
    ] {
        let files: Vec<Vec<u8>> = ["1", "2"]
            .iter()
            .map(|t| {
                compile(
                    method,
                    extra,
                    "5",
                    t,
                    &dir.join(format!("{method}_{t}.safetensors")),
                )
            })
            .collect();
        assert_eq!(
            files[0], files[1],
            "{method}: compiled files differ between 1 and 2 threads"
        );
        // The comparison can fail: another seed gives another file.
        let other = compile(
            method,
            extra,
            "6",
            "2",
            &dir.join(format!("{method}_seed6.safetensors")),
        );
        assert_ne!(
            other, files[0],
            "{method}: another seed gives the same file"
        );
        // Reading and writing again gives the same bytes.
        let m =
            kernelpress::model::CompiledModel::load(&dir.join(format!("{method}_1.safetensors")))
                .unwrap();
        let again = dir.join(format!("{method}_again.safetensors"));
        m.save(&again).unwrap();
        assert_eq!(
            std::fs::read(&again).unwrap(),
            files[0],
            "{method}: rewrite differs"
        );
    }
}

/// The demo model distilled on its calibration rows with the standard ridge grid.
fn demo_compiled(method: Method, features: usize, seed: u64) -> kernelpress::model::CompiledModel {
    let exact = demo_exact();
    let calib = demo_rows("pump_calib.csv");
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        method,
        exact.input_dim(),
        features,
        seed,
    );
    compile_exact(
        &exact,
        Some(calib.view()),
        &spec,
        HeadKind::Distill,
        &RidgeGrid::standard(),
        None,
        &kernelpress::observe::Silent,
    )
    .unwrap()
    .0
}

/// The f32 head (stored transposed, one f32 dot product per output) gives the f64 head's
/// decisions up to f32 rounding: within 1e-5 of the sum of |zᵢ·wᵢⱼ| per output.
#[test]
fn the_f32_head_matches_the_f64_head_to_f32_rounding() {
    let test = demo_rows("pump_test.csv");
    let m = demo_compiled(Method::Hadamard, 256, 4);
    let head = m.head();
    for i in (0..test.nrows()).step_by(61) {
        let row = test.row(i).to_vec();
        let f64s = m.decision_one(&row);
        let f32s = m.decision_one_f32(&row);
        let xs = match m.scaling() {
            Some(s) => s
                .apply(test.slice(ndarray::s![i..i + 1, ..]))
                .row(0)
                .to_vec(),
            None => row.clone(),
        };
        let z = m.program().apply_one(&xs);
        for j in 0..f64s.len() {
            let mass: f64 = z
                .iter()
                .zip(head.column(j))
                .map(|(a, b)| (a * b).abs())
                .sum();
            assert!(
                (f32s[j] - f64s[j]).abs() <= 1e-5 * (mass + 1.0),
                "row {i} output {j}: {} vs {}",
                f32s[j],
                f64s[j]
            );
        }
    }
}

/// The structured maps run in f32 throughout (scale, pad, tile, signs, Walsh–Hadamard,
/// gather, cos/sin all have f32 forms), and so do dense projections followed by cos/sin
/// (Fourier): their features agree with the f64 program to f32 rounding of the cosine
/// arguments; maps with a kernel block have no f32 program and say so. Batches run dense
/// projections as one matrix product, not row by row.
#[test]
fn structured_programs_run_in_f32_to_rounding() {
    let exact = demo_exact();
    let test = demo_rows("pump_test.csv");
    let xs = exact.scale_inputs(test.view());
    for (method, f32_form) in [
        (Method::Hadamard, true),
        (Method::Fastfood, true),
        (Method::Fourier, true),
        (Method::Nystrom, false),
    ] {
        let spec = FeatureSpec::new(exact.kernel().clone(), method, exact.input_dim(), 512, 9);
        let (map, _) = spec.sample(Some(xs.view())).unwrap();
        let p = &map.program;
        assert_eq!(p.runs_in_f32(), f32_form, "{method:?}");
        assert_eq!(
            p.batches_in_f32(),
            f32_form && method != Method::Fourier,
            "{method:?}"
        );
        let mut worst: f64 = 0.0;
        for i in (0..xs.nrows()).step_by(29) {
            let row = xs.row(i).to_vec();
            let z64 = p.apply_one(&row);
            match p.apply_one_f32(&row) {
                None => assert!(!f32_form),
                Some(z32) => {
                    let scale = z64.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                    for (a, b) in z32.iter().zip(&z64) {
                        worst = worst.max((*a as f64 - b).abs() / scale);
                    }
                }
            }
        }
        eprintln!("{method:?}: worst relative feature difference {worst:e}");
        assert!(worst < 1e-5, "{method:?}: {worst}");
        if f32_form {
            assert!(
                worst > 0.0,
                "{method:?}: the f32 path should round somewhere"
            );
        }
    }
}

/// The f32 batches (features per row from the f32 program, one f32 product with the head
/// per block of rows) give the f64 path's decisions up to f32 rounding, for a map with an
/// f32 program (Fastfood), one without (Fourier: its f64 features rounded), and a strided
/// view of the inputs (rows that are not contiguous slices).
#[test]
fn f32_batches_match_the_f64_path_to_f32_rounding() {
    let test = demo_rows("pump_test.csv");
    for method in [Method::Fastfood, Method::Fourier] {
        let m = demo_compiled(method, 256, 4);
        let want = m.decision(test.view());
        let head = m.head();
        let xs = m.scaling().unwrap().apply(test.view());
        let z = m.program().apply(xs.view());
        // 1e-5 of the sum of |zᵢ·wᵢⱼ| per output, as for the single-row f32 head.
        let mass = z.mapv(f64::abs).dot(&head.mapv(f64::abs));
        let check = |got: &Array2<f64>, what: &str| {
            for ((g, w), ms) in got.iter().zip(want.iter()).zip(mass.iter()) {
                assert!(
                    (g - w).abs() <= 1e-5 * (ms + 1.0),
                    "{method:?} {what}: {g} vs {w}"
                );
            }
        };
        let got = m.decision_f32(test.view());
        check(&got, "contiguous");
        assert!(
            got != want,
            "{method:?}: the f32 batch should round somewhere"
        );
        // The same rows through a column-major copy: every row is a strided view.
        let strided = test.t().as_standard_layout().into_owned();
        let got_t = m.decision_f32(strided.t());
        assert_eq!(got_t, got, "{method:?}: strided rows");
    }
}

/// The f32 program's steps and its input map are compiled once per instruction-set level,
/// and the level is passed down to every kernel the steps call (transform, sine/cosine,
/// gather, dense product); every level this CPU runs gives features within f32 rounding of
/// the f64 program on the standardised row. A wrong copy of one level fails here: checked
/// on an AVX-512 machine by hand with a fault in the scalar WHT (caught: "fastfood at
/// scalar") and one in the AVX2 f32 sine/cosine (caught: "fastfood at avx2").
#[test]
fn f32_programs_at_every_level_match_the_f64_program() {
    use kernelpress::program::InputMap;
    let test = demo_rows("pump_test.csv");
    for method in [Method::Fastfood, Method::Hadamard, Method::Fourier] {
        let m = demo_compiled(method, 256, 4);
        let sc = m.scaling().unwrap();
        let inv: Vec<f64> = sc.scale.iter().map(|v| 1.0 / v).collect();
        let xs = sc.apply(test.view());
        let p = m.program();
        let mut scratch = vec![f32::NAN; m.scratch_len()];
        for level in kernelpress::simd::available() {
            let mut worst: f64 = 0.0;
            for i in (0..test.nrows()).step_by(37) {
                let z64 = p.apply_one(&xs.row(i).to_vec());
                let map = InputMap {
                    shift: &sc.mean,
                    factor: &inv,
                };
                let row = test.row(i).to_vec();
                let z32 = p
                    .apply_row_f32_at(level, &row, Some(map), &mut scratch)
                    .unwrap();
                let scale = z64.iter().fold(0.0f64, |a, v| a.max(v.abs()));
                for (a, b) in z32.iter().zip(&z64) {
                    worst = worst.max((*a as f64 - b).abs() / scale);
                }
            }
            assert!(worst < 1e-5, "{method:?} at {}: {worst:e}", level.name());
        }
    }
}

/// The caller-scratch path gives the allocating path's decisions bit for bit, with one
/// scratch reused across rows (stale contents from a previous row must not leak in).
#[test]
fn the_scratch_path_equals_the_allocating_path() {
    let test = demo_rows("pump_test.csv");
    for method in [Method::Fastfood, Method::Fourier] {
        let m = demo_compiled(method, 128, 2);
        let mut scratch = vec![f32::NAN; m.scratch_len()];
        let mut out = vec![0.0; m.head().ncols()];
        for i in 0..50 {
            let row = test.row(i).to_vec();
            m.decision_one_f32_with(&row, &mut scratch, &mut out);
            assert_eq!(out, m.decision_one_f32(&row), "{method:?} row {i}");
        }
    }
}

/// The program's parameters and the head of a compiled model, as one vector.
fn all_numbers(m: &kernelpress::model::CompiledModel) -> Vec<f64> {
    let mut v: Vec<f64> = m
        .program()
        .instrs()
        .iter()
        .flat_map(|i| i.step.params())
        .collect();
    v.extend(m.head().iter());
    v.extend(m.intercept());
    v
}

#[test]
fn refinement_lowers_the_choice_error_and_never_reads_the_audit_rows() {
    use kernelpress::fit::{RefineOptions, Teacher};
    use kernelpress::observe::Silent;
    let exact = demo_exact();
    let calib = demo_rows("pump_calib.csv");
    let calib = calib.slice(ndarray::s![..3000, ..]).to_owned();
    let opts = RefineOptions::new(3).unwrap();
    let grid = RidgeGrid::standard();
    let refine = |x: &Array2<f64>, method: Method, features: usize, seed: u64| {
        let t = Teacher::new(&exact, x.view(), &Silent).unwrap();
        let spec = FeatureSpec::new(
            exact.kernel().clone(),
            method,
            exact.input_dim(),
            features,
            seed,
        );
        t.distil_refined(&spec, &grid, None, &opts, &Silent)
            .unwrap()
    };
    for (method, features) in [(Method::Nystrom, 64), (Method::Hadamard, 128)] {
        let (m, _, sum) = refine(&calib, method, features, 1);
        // The pass kept is judged on the ridge-choice rows: never worse than no pass.
        assert!(sum.choose_mse.1 <= sum.choose_mse.0, "{method:?}: {sum:?}");
        assert!(sum.best_pass >= 1, "{method:?}: no pass improved: {sum:?}");
        assert!(!sum.trained.is_empty());
        assert_eq!(m.fit["refine"]["passes"], serde_json::json!(sum.passes_run));
        // Scrambling the audit rows (every tenth) leaves every number of the model as it
        // was: they are neither fitted on nor used to choose.
        let mut moved = calib.clone();
        for i in (9..moved.nrows()).step_by(10) {
            moved.row_mut(i).mapv_inplace(|v| -3.0 * v + 1.0);
        }
        let (m2, _, sum2) = refine(&moved, method, features, 1);
        assert_eq!(
            all_numbers(&m),
            all_numbers(&m2),
            "{method:?}: audit rows changed the model"
        );
        assert_eq!(sum.choose_mse, sum2.choose_mse);
        // Changing a fitting row does change it (the comparison above can fail).
        let mut fitrow = calib.clone();
        fitrow.row_mut(0).mapv_inplace(|v| v + 0.5);
        let (m3, _, _) = refine(&fitrow, method, features, 1);
        assert_ne!(all_numbers(&m), all_numbers(&m3));
        // Another seed draws another map and refines it elsewhere.
        let (m4, _, _) = refine(&calib, method, features, 2);
        assert_ne!(all_numbers(&m), all_numbers(&m4));
    }
}

#[test]
fn refined_models_are_bit_identical_whatever_the_thread_count() {
    let dir = tmpdir("refined_models_are_bit_identical_whatever_the_thread_count");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 2001);
    let out = |threads: &str, seed: &str| {
        let path = dir.join(format!("refined_{threads}_{seed}.safetensors"));
        let o = std::process::Command::new(bin())
            .env("RAYON_NUM_THREADS", threads)
            .args([
                "compile",
                s(&root().join("models/pump_svm.safetensors")),
                "--calib",
                s(&calib),
                "--target",
                "condition",
                "--method",
                "fastfood",
                "--features",
                "128",
                "--no-bandwidth-search",
                "--no-timing",
                "--refine",
                "2",
                "--seed",
                seed,
                "--out",
                s(&path),
            ])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let err = String::from_utf8_lossy(&o.stderr).to_string();
        assert!(err.contains("refined step"), "{err}");
        std::fs::read(&path).unwrap()
    };
    let one = out("1", "4");
    assert_eq!(
        one,
        out("2", "4"),
        "one thread and two give different files"
    );
    assert_ne!(one, out("2", "5"), "another seed gives the same file");
}

#[test]
fn refine_refuses_what_it_cannot_do() {
    let model = root().join("models/pump_svm.safetensors");
    let calib = root().join("models/pump_calib.csv");
    let dir = tmpdir("refine_refuses_what_it_cannot_do");
    let o = dir.join("m.safetensors");
    let base = [
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--out",
        s(&o),
    ];
    let with = |extra: &[&str]| -> String {
        let mut v: Vec<&str> = base.to_vec();
        v.extend_from_slice(extra);
        bad(&v)
    };
    assert!(
        with(&["--method", "nystrom", "--features", "32", "--refine", "0"]).contains("--refine 0")
    );
    assert!(with(&[
        "--method",
        "nystrom",
        "--features",
        "32",
        "--refine",
        "2",
        "--refine-rate",
        "3"
    ])
    .contains("--refine-rate 3"));
    // (A budget search refines its candidates: tests/choose.rs.)

    assert!(!o.exists(), "nothing is written when refinement is refused");
}

#[test]
fn refinement_over_shards_equals_one_process() {
    // The gradient of every minibatch and the head's statistics are sums over rows, so a
    // refinement whose rows are split into shards (each answering for its own rows, the
    // answers added) is the single-process refinement up to the rounding of the sums.
    use kernelpress::fit::{refine_sharded, RefineOptions, RefineRows, Teacher};
    use kernelpress::observe::Silent;
    let exact = demo_exact();
    let calib = demo_rows("pump_calib.csv");
    let calib = calib.slice(ndarray::s![..2400, ..]).to_owned();
    let opts = RefineOptions::new(3).unwrap();
    let grid = RidgeGrid::standard();
    let t = Teacher::new(&exact, calib.view(), &Silent).unwrap();
    let xt = demo_rows("pump_test.csv");
    let cuts = [0, 777, 778, 1500, 2400];
    let shards = |x: &Array2<f64>| -> Vec<RefineRows<'static>> {
        cuts.windows(2)
            .map(|w| RefineRows::new(&exact, x.slice(ndarray::s![w[0]..w[1], ..]), w[0]).unwrap())
            .collect()
    };
    for (method, features) in [(Method::Hadamard, 128), (Method::Nystrom, 64)] {
        let mut spec = FeatureSpec::new(
            exact.kernel().clone(),
            method,
            exact.input_dim(),
            features,
            3,
        );
        spec.options.landmarks = kernelpress::features::Landmarks::Support;
        let (one, _, s1) = t
            .distil_refined(&spec, &grid, None, &opts, &Silent)
            .unwrap();
        // Shards in scrambled order, one of them a single row; through bytes, as a cluster
        // would move them.
        let mut rows: Vec<RefineRows> = shards(&calib)
            .into_iter()
            .map(|r| RefineRows::from_bytes(&r.to_bytes().unwrap(), "shard").unwrap())
            .collect();
        rows.swap(0, 3);
        let (many, s2) = refine_sharded(&exact, &spec, &grid, &opts, &mut rows, &Silent).unwrap();
        assert_eq!(s1.passes_run, s2.passes_run, "{method:?}");
        assert_eq!(s1.best_pass, s2.best_pass, "{method:?}");
        assert!(s2.best_pass >= 1, "{method:?}: nothing refined");
        assert_eq!(s1.audit_agreement.1, s2.audit_agreement.1, "{method:?}");
        let (a, b) = (one.decision(xt.view()), many.decision(xt.view()));
        let scale = a.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let diff = (&a - &b).iter().fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(
            diff <= 1e-9 * scale,
            "{method:?}: sharded differs by {diff:e} (scale {scale})"
        );
        assert_eq!(many.fit["refine"]["sharded"], serde_json::json!(true));
        // The comparison can fail: another seed's refinement differs by far more.
        let mut other = spec.clone();
        other.seed = 4;
        let (m4, _) = refine_sharded(&exact, &other, &grid, &opts, &mut rows, &Silent).unwrap();
        let d4 = (&a - &m4.decision(xt.view()))
            .iter()
            .fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(d4 > 1e-6 * scale, "{method:?}: {d4:e}");
        // Audit rows scrambled in every shard: the same refined numbers.
        let mut moved = calib.clone();
        for i in (9..moved.nrows()).step_by(10) {
            moved.row_mut(i).mapv_inplace(|v| -3.0 * v + 1.0);
        }
        let (m5, _) =
            refine_sharded(&exact, &spec, &grid, &opts, &mut shards(&moved), &Silent).unwrap();
        let (m6, _) =
            refine_sharded(&exact, &spec, &grid, &opts, &mut shards(&calib), &Silent).unwrap();
        assert!(
            all_numbers(&m5) == all_numbers(&m6),
            "{method:?}: audit rows moved the model"
        );
    }
    // Rows of another teacher, and overlapping shards, are refused.
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::Hadamard,
        exact.input_dim(),
        128,
        3,
    );
    let mut twice = vec![
        RefineRows::new(&exact, calib.slice(ndarray::s![..1000, ..]), 0).unwrap(),
        RefineRows::new(&exact, calib.slice(ndarray::s![500..1500, ..]), 500).unwrap(),
    ];
    let e = refine_sharded(&exact, &spec, &grid, &opts, &mut twice, &Silent).unwrap_err();
    assert!(e.to_string().contains("overlap"), "{e}");
    let other = kernelpress::model::ExactModel::new(
        "gaussian(gamma=0.3)".parse().unwrap(),
        exact.support_vectors().to_owned(),
        exact.coef().to_owned(),
        exact.intercept().to_vec(),
        exact.task(),
        exact.labels().to_vec(),
        exact.scaling().cloned(),
    )
    .unwrap();
    let mut foreign = vec![RefineRows::new(&other, calib.view(), 0).unwrap()];
    let e = refine_sharded(&exact, &spec, &grid, &opts, &mut foreign, &Silent).unwrap_err();
    assert!(e.to_string().contains("another exact model"), "{e}");
}

#[test]
fn factored_heads_are_numpys_best_low_rank_fit() {
    // Reduced-rank regression (Izenman 1975) with Eckart–Young 1936: the factored head's
    // decisions are the full head's fitted values projected on the leading right singular
    // vectors of the centred fitted values on the head-fitting rows. numpy's SVD computes
    // that projection independently of the library's eigen-decomposition.
    use kernelpress::data::{read_npy, write_npy_f64};
    use kernelpress::fit::{row_part, HeadRank, Part, Teacher};
    use kernelpress::observe::Silent;
    let dir = tmpdir("factored_heads_are_numpys_best_low_rank_fit");
    let exact = demo_exact();
    let calib = demo_rows("pump_calib.csv");
    let calib = calib.slice(ndarray::s![..3000, ..]).to_owned();
    let test = demo_rows("pump_test.csv");
    let t = Teacher::new(&exact, calib.view(), &Silent).unwrap();
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::Hadamard,
        exact.input_dim(),
        256,
        2,
    );
    let (full, _) = t
        .distil(&spec, &RidgeGrid::standard(), None, &Silent)
        .unwrap();
    let k = full.n_outputs();
    assert_eq!(k, 6, "the demo is one-vs-one over 4 classes");
    let (fact, sum) = t.factor_head(&full, HeadRank::Fixed(2)).unwrap();
    assert_eq!(sum.rank, Some(2));
    assert_eq!(sum.weights, (256 * 6, 256 * 2 + 2 * 6));
    assert!(fact.parameter_bytes() < full.parameter_bytes());
    let b = ndarray::Array1::from(full.intercept().to_vec());
    let fit_rows: Vec<usize> = (0..calib.nrows())
        .filter(|&i| row_part(i) == Part::Fit)
        .collect();
    let yf = full.decision(calib.select(ndarray::Axis(0), &fit_rows).view()) - &b;
    let yt = full.decision(test.view()) - &b;
    let (pf, pt, po) = (
        dir.join("fit.npy"),
        dir.join("test.npy"),
        dir.join("out.npy"),
    );
    write_npy_f64(&pf, &[yf.nrows(), k], yf.as_slice().unwrap()).unwrap();
    write_npy_f64(&pt, &[yt.nrows(), k], yt.as_slice().unwrap()).unwrap();
    py_inline(
        "import sys, numpy as np\n\
         f = np.load(sys.argv[1]); t = np.load(sys.argv[2])\n\
         _, _, vt = np.linalg.svd(f - f.mean(axis=0), full_matrices=False)\n\
         v = vt[:2].T\n\
         np.save(sys.argv[3], t @ v @ v.T)\n",
        &[s(&pf), s(&pt), s(&po)],
    );
    let want = read_npy(&po).unwrap().into_2d("out").unwrap() + &b;
    let got = fact.decision(test.view());
    let scale = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let diff = (&got - &want).iter().fold(0.0f64, |m, v| m.max(v.abs()));
    assert!(
        diff <= 1e-9 * scale,
        "factored head differs from numpy's projection by {diff:e}"
    );
    // The check can fail: another rank is another projection.
    let (other, _) = t.factor_head(&full, HeadRank::Fixed(3)).unwrap();
    let d3 = (&other.decision(test.view()) - &want)
        .iter()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    assert!(d3 > 1e-6 * scale, "{d3:e}");
    // The f32 single row runs the trailing projection in f32 too.
    assert!(fact.program().runs_in_f32());
    for i in (0..test.nrows()).step_by(97) {
        let row = test.row(i).to_vec();
        let (a, c) = (fact.decision_one(&row), fact.decision_one_f32(&row));
        for (x, y) in a.iter().zip(&c) {
            assert!(
                (x - y).abs() <= 1e-4 * (1.0 + x.abs()),
                "row {i}: {x} vs {y}"
            );
        }
    }
    // Auto: the smallest rank of its ladder within the tolerance on the ridge-choice rows.
    let (_, auto) = t
        .factor_head(&full, HeadRank::Auto { tolerance: 0.002 })
        .unwrap();
    if let Some(r) = auto.rank {
        let f = auto.tried.iter().find(|(q, _)| *q == r).unwrap().1;
        assert!(f >= auto.full - 0.002);
        assert!(auto
            .tried
            .iter()
            .filter(|(q, _)| *q < r)
            .all(|(_, g)| *g < auto.full - 0.002));
    } else {
        assert!(auto.tried.iter().all(|(_, g)| *g < auto.full - 0.002));
    }
    // A saved factored model reads back with the same decisions.
    let path = dir.join("factored.safetensors");
    fact.save(&path).unwrap();
    let back = kernelpress::model::CompiledModel::load(&path).unwrap();
    assert_eq!(back.decision(test.view()), got);
    assert!(back.fit["factored_head"]["rank"] == serde_json::json!(2));
    // Refused: a rank of zero, a single-output model.
    assert!(HeadRank::Fixed(0).checked().is_err());
}

#[test]
fn head_rank_flags_are_checked_and_the_factoring_is_reported() {
    let model = root().join("models/pump_svm.safetensors");
    let calib = dir_calib("head_rank_flags", 1500);
    let dir = tmpdir("head_rank_flags_out");
    let o = dir.join("m.safetensors");
    let run_with = |extra: &[&str]| -> std::process::Output {
        let mut v = vec![
            "compile",
            s(&model),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            "hadamard",
            "--features",
            "128",
            "--no-bandwidth-search",
            "--no-timing",
            "--out",
            s(&o),
        ];
        v.extend_from_slice(extra);
        run(&v)
    };
    for (flag, says) in [("0", "--head-rank 0"), ("many", "--head-rank many")] {
        let out = run_with(&["--head-rank", flag]);
        assert_eq!(out.status.code(), Some(2), "{flag}");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains(says),
            "{flag}"
        );
        assert!(!o.exists(), "nothing is written when the rank is refused");
    }
    let out = run_with(&["--head-rank", "2"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("head factored: 128 features → rank 2"),
        "{err}"
    );
    let m = kernelpress::model::CompiledModel::load(&o).unwrap();
    assert_eq!(m.head().dim(), (2, 6));
    assert_eq!(m.fit["factored_head"]["rank"], serde_json::json!(2));
}

/// The header and first `n` rows of the demo's calibration file, in a folder of its own.
fn dir_calib(name: &str, n: usize) -> std::path::PathBuf {
    let p = tmpdir(name).join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &p, n);
    p
}

/// `compile --head-precision bf16|int8`: `score --f32` multiplies the head at that
/// precision, as numpy recomputes it from the model file by the rule in docs/format.md
/// (tests/reference/head_precision_check.py: decisions within the features' f32 rounding,
/// labels equal, and different from the f64 path's, so the low-precision path ran); the
/// precision survives the file, `score --head-precision` sets it on a model compiled
/// without it (the same scores), `auto` keeps the smallest precision within 0.002 of the
/// f32 head's ridge-choice agreement (recomputed from the figures it stored) and gives
/// bit-identical files twice; bad values exit 2.
#[test]
fn low_precision_heads_score_as_numpy_recomputes_them() {
    let dir = tmpdir("low_precision_heads_score_as_numpy_recomputes_them");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 500);
    let exact = root().join("models/pump_svm.safetensors");
    let compile = |out: &std::path::Path, prec: Option<&str>| {
        let mut args = vec![
            "compile",
            s(&exact),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            "hadamard",
            "--features",
            "512",
            "--no-bandwidth-search",
            "--no-timing",
            "--out",
            s(out),
        ];
        if let Some(p) = prec {
            args.extend(["--head-precision", p]);
        }
        ok(&args)
    };
    let score = |model: &std::path::Path, out: &std::path::Path, extra: &[&str]| {
        let mut args = vec![
            "score",
            "--decisions",
            s(model),
            "--data",
            s(&test),
            "--target",
            "condition",
            "--out",
            s(out),
        ];
        args.extend(extra);
        ok(&args);
        std::fs::read_to_string(out).unwrap()
    };
    let plain = dir.join("plain.safetensors");
    compile(&plain, None);
    for prec in ["int8", "bf16"] {
        let m = dir.join(format!("{prec}.safetensors"));
        compile(&m, Some(prec));
        let loaded = kernelpress::model::CompiledModel::load(&m).unwrap();
        assert_eq!(loaded.head_precision().name(), prec);
        let s32 = dir.join(format!("{prec}_f32.csv"));
        let s64 = dir.join(format!("{prec}_f64.csv"));
        let a = score(&m, &s32, &["--f32"]);
        score(&m, &s64, &[]);
        let summary = py(
            "head_precision_check.py",
            &[s(&m), s(&test), "condition", s(&s32), s(&s64)],
        );
        assert!(
            summary.contains(&format!("\"precision\": \"{prec}\"")),
            "{summary}"
        );
        // The same precision set at score time on the model compiled without it.
        let b = score(
            &plain,
            &dir.join(format!("{prec}_set.csv")),
            &["--f32", "--head-precision", prec],
        );
        assert_eq!(
            a, b,
            "{prec}: score --head-precision differs from the compiled precision"
        );
        // The report names the precision and what it changes against the f64 path.
        let rep = dir.join(format!("{prec}_report.json"));
        ok(&[
            "report",
            s(&m),
            "--exact",
            s(&exact),
            "--data",
            s(&test),
            "--target",
            "condition",
            "--no-timing",
            "--json",
            s(&rep),
        ]);
        let r: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&rep).unwrap()).unwrap();
        assert_eq!(r["head_precision"], prec);
        let same = r["agreement_f32_with_f64"].as_f64().unwrap();
        assert!(same > 0.97 && same <= 1.0, "{prec}: {same}");
    }
    // auto: the rule recomputed from the stored figures; bit-identical twice.
    let (a1, a2) = (dir.join("auto1.safetensors"), dir.join("auto2.safetensors"));
    compile(&a1, Some("auto"));
    compile(&a2, Some("auto"));
    assert_eq!(std::fs::read(&a1).unwrap(), std::fs::read(&a2).unwrap());
    let m = kernelpress::model::CompiledModel::load(&a1).unwrap();
    let rec = &m.fit["head_precision"];
    let tried = rec["tried"].as_array().unwrap();
    let fig = |p: &str| {
        tried
            .iter()
            .find(|t| t["precision"] == p)
            .and_then(|t| t["choose_figure"].as_f64())
            .unwrap()
    };
    let full = fig("f32");
    let want = ["int8", "bf16", "f32"]
        .into_iter()
        .find(|p| fig(p) >= full - 0.002)
        .unwrap();
    assert_eq!(rec["chosen"], want);
    assert_eq!(m.head_precision().name(), want);
    // Bad values.
    let e = bad(&[
        "compile",
        s(&exact),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "64",
        "--head-precision",
        "int4",
        "--out",
        s(&dir.join("never.safetensors")),
    ]);
    assert!(e.contains("int4") && e.contains("bf16"), "{e}");
    assert!(!dir.join("never.safetensors").exists());
    let e = bad(&[
        "score",
        s(&exact),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--f32",
        "--head-precision",
        "int8",
    ]);
    assert!(e.contains("exact model has no head"), "{e}");
}

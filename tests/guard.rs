//! The guarded model: the extremes equal the exact and the compiled model, a threshold
//! chosen for an agreement target meets it on fresh rows, the one-sided bound matches
//! scipy's Wilson interval, and the command line writes, scores (f64 and f32), reports and
//! exports guarded files.

mod common;

use common::*;
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{audit_row, RidgeGrid, Teacher};
use kernelpress::model::guarded::{
    choose_guard, choose_guard_auto, pairs_to_check, threshold_for_agreement, threshold_for_rate,
    wilson_lower_one_sided, GuardRule, GuardTarget,
};
use kernelpress::model::{label_indices, AnyModel, CompiledModel, ExactModel, GuardedModel};
use kernelpress::observe::Silent;
use ndarray::{Array2, Axis};

fn demo() -> (ExactModel, Array2<f64>, Array2<f64>) {
    (
        demo_exact(),
        demo_rows("pump_calib.csv"),
        demo_rows("pump_test.csv"),
    )
}

/// Compiled and exact decisions on the calibration audit rows (every tenth row, where
/// thresholds are chosen).
fn audit_decisions(
    exact: &ExactModel,
    c: &CompiledModel,
    calib: &Array2<f64>,
) -> (Array2<f64>, Array2<f64>) {
    let idx: Vec<usize> = (0..calib.nrows()).filter(|&i| audit_row(i)).collect();
    let xa = calib.select(Axis(0), &idx);
    (c.decision(xa.view()), exact.decision(xa.view()))
}

/// A deliberately weak compiled model (64 random Fourier features), so the guard has work.
fn weak(exact: &ExactModel, calib: &Array2<f64>) -> CompiledModel {
    let t = Teacher::new(exact, calib.view(), &Silent).unwrap();
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::Fourier,
        exact.input_dim(),
        64,
        5,
    );
    t.distil(&spec, &RidgeGrid::standard(), None, &Silent)
        .unwrap()
        .0
}

#[test]
fn the_extremes_are_the_exact_and_the_compiled_model() {
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    let all = GuardedModel::new(c.clone(), exact.clone(), f64::INFINITY).unwrap();
    let (s, st) = all.decision(test.view());
    assert_eq!(s, exact.decision(test.view()));
    assert!(st.iter().all(|&k| k == 1));
    let none = GuardedModel::new(c.clone(), exact.clone(), f64::NEG_INFINITY).unwrap();
    let (s, st) = none.decision(test.view());
    assert_eq!(s, c.decision(test.view()));
    assert!(st.iter().all(|&k| k == 0));
    // One row at a time gives the same answers as the batch.
    let mid = GuardedModel::new(c, exact, 0.3).unwrap();
    let (s, st) = mid.decision(test.view());
    for i in (0..test.nrows()).step_by(97) {
        let (one, k) = mid.decision_one(test.row(i).as_slice().unwrap());
        assert_eq!(k, st[i]);
        for (a, b) in one.iter().zip(s.row(i)) {
            assert!(
                (a - b).abs() <= 1e-12 * (1.0 + b.abs()),
                "row {i}: {a} vs {b}"
            );
        }
    }
}

/// Fresh rows (the demo test set, never seen by the fit or the threshold) meet the target
/// within sampling noise: the threshold is chosen so that a one-sided 95% lower bound on
/// the audit rows is at least the target.
#[test]
fn a_threshold_for_an_agreement_target_meets_it_on_fresh_rows() {
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    let k = exact.labels().len();
    let (sc, se) = audit_decisions(&exact, &c, &calib);
    let base = {
        let a = label_indices(exact.task(), k, sc.view());
        let b = label_indices(exact.task(), k, se.view());
        a.iter().zip(&b).filter(|(x, y)| x == y).count() as f64 / a.len() as f64
    };
    assert!(
        base < 0.97,
        "the weak model should need the guard (agreement {base})"
    );
    for target in [0.98, 0.995] {
        let (t, share) =
            threshold_for_agreement(exact.task(), k, sc.view(), se.view(), target).unwrap();
        assert!(share > 0.0 && share < 1.0, "{target}: share {share}");
        let g = GuardedModel::new(c.clone(), exact.clone(), t).unwrap();
        let (sg, st) = g.decision(test.view());
        let a = label_indices(exact.task(), k, sg.view());
        let b = label_indices(exact.task(), k, exact.decision(test.view()).view());
        let n = a.len() as f64;
        let agree = a.iter().zip(&b).filter(|(x, y)| x == y).count() as f64 / n;
        let se_fresh = (target * (1.0 - target) / n).sqrt();
        assert!(
            agree >= target - 2.0 * se_fresh,
            "target {target}: fresh agreement {agree} (fallback {:.3})",
            st.iter().filter(|&&s| s == 1).count() as f64 / n
        );
        // A fixed rate sends about that share of the same rows.
        let t2 = threshold_for_rate(exact.task(), k, sc.view(), share);
        assert!((t2 - t).abs() < 1e-12 || share == 0.0, "{t2} vs {t}");
    }
}

/// The one-sided 95% bound is the lower end of scipy's two-sided 90% Wilson interval
/// (`scipy.stats.binomtest(k, n).proportion_ci(0.90, 'wilson')`).
#[test]
fn one_sided_bound_matches_scipy_wilson() {
    for (k, n) in [
        (95usize, 100usize),
        (990, 1000),
        (7, 7),
        (0, 12),
        (4321, 4400),
    ] {
        let want: f64 = py_inline(
            "import sys; from scipy.stats import binomtest; \
             print(binomtest(int(sys.argv[1]), int(sys.argv[2])).proportion_ci(0.90, 'wilson').low)",
            &[&k.to_string(), &n.to_string()],
        )
        .trim()
        .parse()
        .unwrap();
        let got = wilson_lower_one_sided(k, n);
        assert!((got - want).abs() < 1e-9, "{k}/{n}: {got} vs scipy {want}");
    }
}

#[test]
fn command_line_writes_scores_reports_and_exports_a_guarded_model() {
    let d = tmpdir("guard_cli");
    let calib = d.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let test = root().join("models/pump_test.csv");
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("g.safetensors");
    let json = d.join("r.json");
    let text = ok(&[
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--eval",
        s(&test),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "128",
        "--guard-agreement",
        "0.99",
        "--guard-rule",
        "row",
        "--out",
        s(&out),
        "--json",
        s(&json),
    ]);
    assert!(text.contains("answered by"), "{text}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let shares = r["stage_shares"].as_array().unwrap();
    assert_eq!(shares.len(), 3);
    assert_eq!(
        shares[2].as_f64().unwrap(),
        0.0,
        "the row rule completes no row"
    );
    let total: f64 = shares.iter().map(|v| v.as_f64().unwrap()).sum();
    assert!((total - 1.0).abs() < 1e-12);
    assert!(shares[1].as_f64().unwrap() > 0.0);
    for key in [
        "latency_us_compiled_mean",
        "speedup_mean",
        "speedup_mean_f32",
        "agreement",
    ] {
        let v = r[key].as_f64().unwrap();
        assert!(v.is_finite() && v > 0.0, "{key}: {v}");
    }
    // score: a stage column, and the rows the exact model answered score as the exact model.
    let g = ok(&[
        "score",
        "--decisions",
        s(&out),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let e = ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let gl: Vec<&str> = g.lines().collect();
    let el: Vec<&str> = e.lines().collect();
    assert!(
        gl[0].starts_with("label,margin,") && gl[0].ends_with(",stage"),
        "{}",
        gl[0]
    );
    let mut exact_rows = 0;
    for (a, b) in gl[1..].iter().zip(&el[1..]) {
        if let Some(row) = a.strip_suffix(",exact") {
            assert_eq!(row, *b);
            exact_rows += 1;
        } else {
            assert!(a.ends_with(",compiled"), "{a}");
        }
    }
    let share = exact_rows as f64 / (gl.len() - 1) as f64;
    assert!((share - shares[1].as_f64().unwrap()).abs() < 1e-12);
    // score --f32: the exact model's single-precision batches stay near its f64 decisions
    // (1e-4 of the scale on this model, where the coefficient sums cancel); a guarded model
    // scores both stages in f32, with its stage column, as its exports do.
    let e32 = ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--f32",
    ]);
    let e32l: Vec<&str> = e32.lines().collect();
    assert_eq!(e32l[0], el[0]);
    let mut same_label = 0;
    for (a, b) in e32l[1..].iter().zip(&el[1..]) {
        let (ca, cb): (Vec<&str>, Vec<&str>) = (a.split(',').collect(), b.split(',').collect());
        // label, margin, four class columns, then the six pairwise decisions.
        for (u, v) in ca[6..].iter().zip(&cb[6..]) {
            let (u, v): (f64, f64) = (u.parse().unwrap(), v.parse().unwrap());
            assert!((u - v).abs() <= 1e-3 * v.abs().max(1.0), "{a} vs {b}");
        }
        same_label += usize::from(ca[0] == cb[0]);
    }
    assert!(same_label as f64 >= 0.99 * (el.len() - 1) as f64);
    assert_ne!(e32, e, "f32 decisions round somewhere");
    let err = ok(&[
        "score",
        "--decisions",
        s(&out),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--f32",
    ]);
    assert!(err.lines().next().unwrap().ends_with(",stage"), "{err}");
    let g64: Vec<&str> = gl.iter().map(|l| l.split(',').next().unwrap()).collect();
    let g32: Vec<String> = err
        .lines()
        .map(|l| l.split(',').next().unwrap().to_string())
        .collect();
    let same = g64
        .iter()
        .zip(&g32)
        .filter(|(a, b)| **a == b.as_str())
        .count();
    assert!(
        same as f64 >= 0.99 * g64.len() as f64,
        "{same} of {}",
        g64.len()
    );
    // The file round-trips, and reading it as any model gives the guarded kind.
    let (m, _) = AnyModel::load(&out).unwrap();
    assert!(matches!(m, AnyModel::Guarded(_)));
    // report on a guarded file.
    let rt = ok(&[
        "report",
        s(&out),
        "--exact",
        s(&model),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
    ]);
    assert!(rt.contains("answered by"), "{rt}");
    // inspect names the guard.
    assert!(ok(&["inspect", s(&out)]).contains("guarded"));
    // export writes the whole guarded model (tests/export.rs checks it in every runtime).
    let text = ok(&[
        "export",
        s(&out),
        "--format",
        "onnx",
        "--out",
        s(&d.join("g.onnx")),
    ]);
    assert!(text.contains("guarded model"), "{text}");
    // Regression models cannot be guarded; bad flags are bad input.
    let err = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--method",
        "fourier",
        "--features",
        "64",
        "--guard-agreement",
        "1.5",
        "--out",
        s(&d.join("x.safetensors")),
    ]);
    assert!(err.contains("--guard-agreement"), "{err}");
    // A regression model has no margin: refused before any work, nothing written.
    let rows: Vec<Vec<f64>> = (0..60)
        .map(|i| vec![(i as f64 * 0.37).sin(), (i as f64 * 0.11).cos()])
        .collect();
    let y: Vec<String> = rows
        .iter()
        .map(|r| format!("{}", r[0] - 2.0 * r[1]))
        .collect();
    let data = d.join("reg.csv");
    write_csv(&data, &["a", "b"], &rows, Some(("y", &y)));
    let reg = d.join("reg.safetensors");
    ok(&[
        "train",
        "--data",
        s(&data),
        "--target",
        "y",
        "--kernel",
        "gaussian(gamma=1)",
        "--model",
        "ridge",
        "--ridge",
        "0.1",
        "--out",
        s(&reg),
    ]);
    let err = bad(&[
        "compile",
        s(&reg),
        "--calib",
        s(&data),
        "--target",
        "y",
        "--method",
        "fourier",
        "--features",
        "16",
        "--guard-rate",
        "0.1",
        "--out",
        s(&d.join("rg.safetensors")),
    ]);
    assert!(err.contains("needs a classifier"), "{err}");
    assert!(!d.join("rg.safetensors").exists());
}

/// The pairs rule at its extremes: a threshold of +∞ marks every pair of every row (the
/// exact model's values, read from its grouped copy: equal to rounding), 0 marks none
/// (the compiled model, bit for bit); in between, one row at a time equals the batch.
#[test]
fn the_pairs_rule_extremes_are_the_exact_and_the_compiled_model() {
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    let se = exact.decision(test.view());
    let all =
        GuardedModel::with_rule(c.clone(), exact.clone(), f64::INFINITY, GuardRule::Pairs).unwrap();
    let (s, st) = all.decision(test.view());
    assert!(st.iter().all(|&k| k == 1));
    for (a, b) in s.iter().zip(se.iter()) {
        assert!((a - b).abs() <= 1e-12 * (1.0 + b.abs()), "{a} vs {b}");
    }
    assert_eq!(all.exact_work_share(test.view()), 1.0);
    let none = GuardedModel::with_rule(c.clone(), exact.clone(), 0.0, GuardRule::Pairs).unwrap();
    let (s, st) = none.decision(test.view());
    assert_eq!(s, c.decision(test.view()));
    assert!(st.iter().all(|&k| k == 0));
    let mid = GuardedModel::with_rule(c, exact.clone(), 0.3, GuardRule::Pairs).unwrap();
    let (s, st) = mid.decision(test.view());
    assert!(
        st.contains(&2),
        "some rows should be completed, not answered whole"
    );
    // Batches take the exact values from the batched path (a matrix product), single rows
    // from the grouped support vectors: the same sums in another order.
    for i in (0..test.nrows()).step_by(37) {
        let (one, k) = mid.decision_one(test.row(i).as_slice().unwrap());
        assert_eq!(k, st[i], "row {i}");
        for (a, b) in one.iter().zip(s.row(i)) {
            assert!(
                (a - b).abs() <= 1e-9 * (1.0 + b.abs()),
                "row {i}: {a} vs {b}"
            );
        }
    }
    let w = mid.exact_work_share(test.view());
    assert!(w > 0.0 && w < 1.0, "work share {w}");
    // The regression and binary refusals.
    assert!(
        GuardedModel::with_rule(weak(&exact, &calib), binary_model(), 0.3, GuardRule::Pairs)
            .is_err()
    );
}

/// A two-class model (the pairs rule needs one-vs-one outputs).
fn binary_model() -> ExactModel {
    let sv = Array2::from_shape_fn((20, 8), |(i, j)| ((i * 8 + j) as f64 * 0.37).sin());
    let coef = Array2::from_shape_fn((20, 1), |(i, _)| if i % 2 == 0 { 1.0 } else { -1.0 });
    ExactModel::new(
        "gaussian(gamma=0.25)".parse().unwrap(),
        sv,
        coef,
        vec![0.0],
        kernelpress::model::Task::Binary,
        vec!["a".into(), "b".into()],
        None,
    )
    .unwrap()
}

/// The exact model's partial decisions: every output marked is the full decision value
/// (to rounding), and the share of support vectors read is the share with a nonzero
/// coefficient in a marked output, counted directly from the coefficients.
#[test]
fn partial_exact_decisions_read_only_the_marked_outputs_support_vectors() {
    let (exact, _, test) = demo();
    let k = exact.n_outputs();
    let coef = exact.coef();
    for (r, mask) in [0b000001usize, 0b100010, 0b011100, 0b111111]
        .iter()
        .enumerate()
    {
        let needed: Vec<bool> = (0..k).map(|j| mask >> j & 1 == 1).collect();
        let row = test.row(r * 11);
        let row = row.as_slice().unwrap();
        let full = exact.decision_one(row);
        let some = exact.decision_some_one(row, &needed);
        for j in 0..k {
            if needed[j] {
                assert!(
                    (some[j] - full[j]).abs() <= 1e-12 * (1.0 + full[j].abs()),
                    "output {j}: {} vs {}",
                    some[j],
                    full[j]
                );
            } else {
                assert!(some[j].is_nan());
            }
        }
        let count = coef
            .rows()
            .into_iter()
            .filter(|c| (0..k).any(|j| needed[j] && c[j] != 0.0))
            .count();
        let want = count as f64 / coef.nrows() as f64;
        assert_eq!(exact.support_share(&needed), want, "mask {mask:b}");
        if *mask != 0b111111 {
            assert!(
                want < 1.0,
                "a one-vs-one pair reads only its classes' vectors"
            );
        }
    }
}

/// What the pairs rule promises: whenever every pair it leaves to the compiled model has
/// the exact model's sign, the guarded label is the exact label. Checked on every demo test
/// row at several thresholds (the rows where the premise holds must be most of them, or the
/// check would be empty).
#[test]
fn pairs_rule_gives_the_exact_label_when_the_unmarked_signs_are_right() {
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    let k = exact.labels().len();
    let sc = c.decision(test.view());
    let se = exact.decision(test.view());
    let le = label_indices(exact.task(), k, se.view());
    for tau in [0.05, 0.2, 0.5, 1.0] {
        let g = GuardedModel::with_rule(c.clone(), exact.clone(), tau, GuardRule::Pairs).unwrap();
        let (sg, _) = g.decision(test.view());
        let lg = label_indices(exact.task(), k, sg.view());
        let mut premise = 0;
        for i in 0..test.nrows() {
            let d = sc.row(i).to_vec();
            let m = pairs_to_check(k, &d, tau);
            let holds = (0..d.len()).all(|j| m[j] || (d[j] > 0.0) == (se[[i, j]] > 0.0));
            if holds {
                premise += 1;
                assert_eq!(lg[i], le[i], "tau {tau}, row {i}");
            }
        }
        assert!(
            premise * 2 > test.nrows(),
            "tau {tau}: premise held on {premise} rows"
        );
    }
}

/// A pairs guard chosen for a target on the audit rows meets it on fresh rows (within
/// sampling noise); the automatic choice takes the rule with less exact work. (On this
/// four-class demo with a weak compiled stage the row rule reads less; on the
/// Fashion-MNIST teacher, ten classes, the pairs rule reads a fraction: see the README.)
#[test]
fn a_pairs_guard_for_a_target_meets_it_on_fresh_rows_and_auto_takes_the_cheaper_rule() {
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    let k = exact.labels().len();
    let (sc, se) = audit_decisions(&exact, &c, &calib);
    let le = label_indices(exact.task(), k, exact.decision(test.view()).view());
    for target in [0.98, 0.995] {
        let t = GuardTarget::Agreement(target);
        let pc = choose_guard(&exact, GuardRule::Pairs, sc.view(), se.view(), t).unwrap();
        let rc = choose_guard(&exact, GuardRule::Row, sc.view(), se.view(), t).unwrap();
        let auto = choose_guard_auto(&exact, sc.view(), se.view(), t).unwrap();
        let cheaper = if pc.work_share < rc.work_share {
            &pc
        } else {
            &rc
        };
        assert_eq!(&auto, cheaper, "{target}");
        assert!(pc.work_share > 0.0 && pc.work_share < 1.0, "{pc:?}");
        let g = GuardedModel::with_rule(c.clone(), exact.clone(), pc.threshold, GuardRule::Pairs)
            .unwrap();
        let (sg, _) = g.decision(test.view());
        let lg = label_indices(exact.task(), k, sg.view());
        let n = lg.len() as f64;
        let agree = lg.iter().zip(&le).filter(|(a, b)| a == b).count() as f64 / n;
        let se_fresh = (target * (1.0 - target) / n).sqrt();
        assert!(
            agree >= target - 2.0 * se_fresh,
            "target {target}: fresh agreement {agree} ({pc:?})"
        );
        // A rate: the exact model takes part in at most that share of the audit rows.
        let rc = choose_guard(
            &exact,
            GuardRule::Pairs,
            sc.view(),
            se.view(),
            GuardTarget::Rate(0.1),
        )
        .unwrap();
        assert!(rc.fallback_share <= 0.1, "{rc:?}");
    }
}

/// `--allow-guard` lets the budget search return a guarded model: guarded candidates are
/// listed beside the plain ones, and whatever is written meets the bound on the audit rows
/// it was judged on; without a fidelity bound the flag is refused.
#[test]
fn the_budget_search_may_return_a_guarded_model() {
    let d = tmpdir("guard_budget");
    let model = root().join("models/pump_svm.safetensors");
    let calib = root().join("models/pump_calib.csv");
    let out = d.join("b.safetensors");
    let text = ok(&[
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--methods",
        "nystrom",
        "--max-disagreement",
        "0.01",
        "--allow-guard",
        "--no-timing",
        "--out",
        s(&out),
    ]);
    assert!(text.contains("nystrom+guard"), "{text}");
    // The candidate table: the chosen line's disagreement is within the bound.
    let chosen = text
        .lines()
        .find(|l| l.starts_with("chosen: "))
        .unwrap_or_else(|| panic!("{text}"));
    let guarded = chosen.contains("guarded by the exact model");
    let (m, _) = AnyModel::load(&out).unwrap();
    assert_eq!(matches!(m, AnyModel::Guarded(_)), guarded, "{chosen}");
    let rows: Vec<(String, usize, f64)> = text
        .lines()
        .filter_map(|l| {
            let f: Vec<&str> = l.split_whitespace().collect();
            (f.len() == 6 && f[0].starts_with("nystrom")).then(|| {
                (
                    f[0].to_string(),
                    f[1].parse().unwrap(),
                    f[2].parse().unwrap(),
                )
            })
        })
        .collect();
    assert!(rows.iter().any(|r| r.0 == "nystrom+guard"), "{text}");
    for r in rows.iter().filter(|r| r.0 == "nystrom+guard") {
        assert!(r.2 <= 0.01, "a guarded candidate meets its target: {r:?}");
    }
    let err = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--budget-us",
        "10",
        "--allow-guard",
        "--out",
        s(&d.join("x.safetensors")),
    ]);
    assert!(err.contains("--max-disagreement"), "{err}");
    assert!(!d.join("x.safetensors").exists());
}

/// The command line with `--guard-rule pairs`: the file records the rule, `inspect` says
/// what it does, `score` names completed rows `partial`, and their label columns agree
/// with the report's stage shares.
#[test]
fn command_line_pairs_guard_scores_partial_rows() {
    let d = tmpdir("guard_pairs_cli");
    let calib = d.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let test = root().join("models/pump_test.csv");
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("g.safetensors");
    let json = d.join("r.json");
    ok(&[
        "compile",
        s(&model),
        "--calib",
        s(&calib),
        "--eval",
        s(&test),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "256",
        "--guard-rate",
        "0.2",
        "--guard-rule",
        "pairs",
        "--no-timing",
        "--out",
        s(&out),
        "--json",
        s(&json),
    ]);
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let shares: Vec<f64> = r["stage_shares"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    assert!(shares[2] > 0.0, "{shares:?}");
    let w = r["exact_work_share"].as_f64().unwrap();
    assert!(
        w > 0.0 && w < shares[1] + shares[2],
        "work {w}, shares {shares:?}"
    );
    assert!(ok(&["inspect", s(&out)]).contains("class pairs"));
    let g = ok(&[
        "score",
        "--decisions",
        s(&out),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let rows: Vec<&str> = g.lines().skip(1).collect();
    for (st, want) in ["compiled", "exact", "partial"].iter().zip(&shares) {
        let n = rows
            .iter()
            .filter(|l| l.ends_with(&format!(",{st}")))
            .count();
        assert!(
            (n as f64 / rows.len() as f64 - want).abs() < 1e-12,
            "{st}: {n} rows vs share {want}"
        );
    }
}

/// The guarded model in f32, one row at a time and in batches, under both rules: the same
/// stage as the other f32 path on every row not within rounding of the threshold, and
/// decisions within f32 rounding of the f64 guarded model's where the stages agree.
#[test]
fn f32_rows_and_batches_agree_under_both_rules() {
    use kernelpress::model::guarded::GuardRule;
    let (exact, calib, test) = demo();
    let c = weak(&exact, &calib);
    for rule in [GuardRule::Row, GuardRule::Pairs] {
        let g = GuardedModel::with_rule(c.clone(), exact.clone(), 0.5, rule).unwrap();
        let (s64, st64) = g.decision(test.view());
        let (sb, stb) = g.decision_f32(test.view());
        let scale = s64.iter().fold(1.0f64, |a, v| a.max(v.abs()));
        let mut checked = 0;
        for (i, r) in test.rows().into_iter().enumerate() {
            let (s1, st1) = g.decision_one_f32(r.as_slice().unwrap());
            let near = s64
                .row(i)
                .iter()
                .any(|v| (v.abs() - 0.5).abs() < 1e-3 * scale);
            if near {
                continue;
            }
            checked += 1;
            assert_eq!(st1, stb[i], "{rule:?} row {i}");
            assert_eq!(st1, st64[i], "{rule:?} row {i}");
            for j in 0..s64.ncols() {
                assert!(
                    (s1[j] - s64[[i, j]]).abs() <= 1e-3 * scale,
                    "{rule:?} row {i}"
                );
                assert!(
                    (sb[[i, j]] - s64[[i, j]]).abs() <= 1e-3 * scale,
                    "{rule:?} row {i}"
                );
            }
        }
        assert!(checked > test.nrows() / 2);
        assert!(st64.iter().any(|&s| s != 0), "{rule:?}: the guard has work");
    }
}

/// The f32 partial rows (the pairs rule's completion when scoring in f32) read the f32 copy
/// of the grouped support vectors: on the marked outputs they equal the exact model's full
/// f64 row to f32 rounding, for the Gaussian, Laplacian and a sum kernel (the Euclidean,
/// L1 and composite paths); the unmarked outputs are NaN.
#[test]
fn f32_partial_rows_match_the_full_rows_to_f32_rounding() {
    let (demo, _, test) = demo();
    for kernel in [
        "gaussian(gamma=0.2)",
        "laplacian(gamma=0.3)",
        "gaussian(gamma=0.1) + 0.5 * laplacian(gamma=0.2)",
    ] {
        let exact = ExactModel::new(
            kernel.parse().unwrap(),
            demo.support_vectors().to_owned(),
            demo.coef().to_owned(),
            demo.intercept().to_vec(),
            demo.task(),
            demo.labels().to_vec(),
            demo.scaling().cloned(),
        )
        .unwrap();
        let k = exact.n_outputs();
        let mass: f64 = exact.coef().iter().map(|c| c.abs()).sum();
        let mut worst: f64 = 0.0;
        for (r, mask) in [0b000001usize, 0b100010, 0b011100, 0b110101]
            .iter()
            .enumerate()
        {
            let needed: Vec<bool> = (0..k).map(|j| mask >> j & 1 == 1).collect();
            for i in (r..test.nrows()).step_by(97) {
                let row = test.row(i);
                let row = row.as_slice().unwrap();
                let full = exact.decision_one(row);
                let some = exact.decision_some_one_f32(row, &needed);
                for j in 0..k {
                    if needed[j] {
                        let e = (some[j] - full[j]).abs();
                        worst = worst.max(e / mass);
                        assert!(
                            e <= 1e-5 * mass,
                            "{kernel} row {i} output {j}: {} vs {}",
                            some[j],
                            full[j]
                        );
                    } else {
                        assert!(some[j].is_nan());
                    }
                }
            }
        }
        // f32 rounding shows (the f32 copy is read, not the f64 one).
        assert!(worst > 0.0, "{kernel}: no f32 rounding at all");
    }
}

//! Choosing for a budget: the Pareto front, the budget search against an exhaustive grid,
//! the cost model's ranking against measurements, the sweep's files (checked by a real
//! browser and an XML parser), and budgets nothing can meet.

mod common;

use common::*;
use kernelpress::choose::{pareto_front, search, spearman, Budget, Choice, SearchOptions};
use kernelpress::cost::{predict_compiled, MachineProfile};
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{audit_row, RidgeGrid, Teacher};
use kernelpress::model::{label_indices, ExactModel};
use kernelpress::observe::Silent;
use kernelpress::report::measure_single;
use ndarray::{s, Array2, Axis};
use std::path::Path;

fn demo() -> (ExactModel, Array2<f64>) {
    (demo_exact(), demo_rows("pump_calib.csv"))
}

#[test]
fn pareto_front_by_hand() {
    // (latency, loss), worked out by hand: b is beaten by a (faster, better); d by c
    // (same latency, better); e equals f (neither strictly better, both kept); g is the
    // only point with loss 0.
    let pts = [
        (1.0, 0.30), // a
        (2.0, 0.35), // b
        (3.0, 0.10), // c
        (3.0, 0.20), // d
        (5.0, 0.05), // e
        (5.0, 0.05), // f
        (40.0, 0.0), // g
        (50.0, 0.0), // h: beaten by g
    ];
    assert_eq!(
        pareto_front(&pts),
        vec![true, false, true, false, true, true, true, false]
    );
    // Every point off the front is dominated by a point on it.
    let front = pareto_front(&pts);
    for (i, p) in pts.iter().enumerate().filter(|(i, _)| !front[*i]) {
        assert!(
            pts.iter()
                .enumerate()
                .any(|(j, q)| front[j] && q.0 <= p.0 && q.1 <= p.1 && j != i),
            "{p:?}"
        );
    }
}

#[test]
fn spearman_matches_the_textbook_cases() {
    // Perfectly monotone: 1; reversed: −1; the classic 5-point example with one swap:
    // 1 − 6·Σd²/(n(n²−1)) = 1 − 6·2/120 = 0.9 (Spearman's formula, no ties).
    assert!((spearman(&[1.0, 2.0, 3.0], &[10.0, 20.0, 30.0]) - 1.0).abs() < 1e-12);
    assert!((spearman(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0]) + 1.0).abs() < 1e-12);
    let r = spearman(&[1.0, 2.0, 3.0, 4.0, 5.0], &[1.0, 3.0, 2.0, 4.0, 5.0]);
    assert!((r - 0.9).abs() < 1e-12, "{r}");
}

/// Ladder rungs that give the same map size (Taylor features come in whole degrees) are
/// built once: no (method, features) pair appears twice among the candidates.
#[test]
fn search_builds_each_map_size_once() {
    let (exact, calib) = demo();
    let calib = calib.slice(s![..1500, ..]).to_owned();
    let teacher = Teacher::new(&exact, calib.view(), &Silent).unwrap();
    let opts = SearchOptions {
        methods: vec![Method::parse("taylor").unwrap()],
        ladder: vec![16, 32, 48, 64, 128, 256],
        seed: 3,
        grid: RidgeGrid::standard(),
        reps: 20,
        guard: false,
        refine: None,
        head_rank: None,
    };
    // Smaller than the exact model, and a fidelity bound nothing meets: every rung whose
    // prediction fits is built, smallest first.
    let budget = Budget {
        max_bytes: Some(200_000),
        max_loss: Some(0.0001),
        ..Budget::default()
    };
    let res = search(&teacher, &MachineProfile::nominal(), budget, &opts, &Silent).unwrap();
    let mut seen: Vec<(String, usize)> = Vec::new();
    for r in res.tried.iter().filter(|r| !r.exact) {
        let key = (r.method.clone(), r.features);
        assert!(!seen.contains(&key), "{key:?} built twice: {:?}", seen);
        seen.push(key);
    }
    assert!(!seen.is_empty(), "{:?} {:?}", res.notes, res.choice);
}

/// The search with a size budget (deterministic: no timing decides it) returns the model
/// an exhaustive grid over the same methods and feature counts picks: the smallest
/// held-out disagreement among the models within the byte budget.
#[test]
fn search_returns_the_exhaustive_grid_choice() {
    let (exact, calib) = demo();
    let calib = calib.slice(s![..3000, ..]).to_owned();
    let teacher = Teacher::new(&exact, calib.view(), &Silent).unwrap();
    let methods = vec![Method::Fourier, Method::Hadamard, Method::Nystrom];
    let ladder = vec![32, 64, 128, 256];
    let max_bytes = 40_000u64;
    let opts = SearchOptions {
        methods: methods.clone(),
        ladder: ladder.clone(),
        seed: 3,
        grid: RidgeGrid::standard(),
        reps: 20,
        guard: false,
        refine: None,
        head_rank: None,
    };
    let budget = Budget {
        max_bytes: Some(max_bytes),
        ..Budget::default()
    };
    let res = search(&teacher, &MachineProfile::nominal(), budget, &opts, &Silent).unwrap();
    let Choice::Compiled { model, record } = res.choice else {
        panic!("expected a compiled model, got {:?}", res.choice)
    };
    // The grid.
    let idx: Vec<usize> = (0..calib.nrows()).filter(|&i| audit_row(i)).collect();
    let xv = calib.select(Axis(0), &idx);
    let k = exact.labels().len();
    let want = label_indices(exact.task(), k, exact.decision(xv.view()).view());
    let mut best: Option<(f64, String, usize)> = None;
    for m in &methods {
        for &f in &ladder {
            let spec = FeatureSpec::new(exact.kernel().clone(), *m, exact.input_dim(), f, 3);
            let (c, _) = teacher
                .distil(&spec, &RidgeGrid::standard(), None, &Silent)
                .unwrap();
            if c.parameter_bytes() as u64 > max_bytes {
                continue;
            }
            let got = label_indices(exact.task(), k, c.decision(xv.view()).view());
            let loss =
                want.iter().zip(&got).filter(|(a, b)| a != b).count() as f64 / want.len() as f64;
            if best.as_ref().is_none_or(|b| loss < b.0) {
                best = Some((loss, m.name().to_string(), c.features()));
            }
        }
    }
    let (loss, m, f) = best.unwrap();
    assert_eq!(
        (record.method.as_str(), record.features),
        (m.as_str(), f),
        "search chose {} {} (loss {}), the grid {m} {f} (loss {loss})",
        record.method,
        record.features,
        record.loss
    );
    assert!((record.loss - loss).abs() < 1e-12);
    assert!(model.parameter_bytes() as u64 <= max_bytes);
}

/// The cost model ranks candidates as the measurements do (on the demo model: methods and
/// sizes from 64 to 4,096 features).
#[test]
fn predicted_latency_ranks_like_measured_latency() {
    let (exact, calib) = demo();
    let calib = calib.slice(s![..1500, ..]).to_owned();
    let teacher = Teacher::new(&exact, calib.view(), &Silent).unwrap();
    let profile = MachineProfile::measure(1).unwrap();
    let mut pred = Vec::new();
    let mut meas = Vec::new();
    for (m, f) in [
        (Method::Fourier, 64),
        (Method::Fourier, 512),
        (Method::Fourier, 4096),
        (Method::Hadamard, 256),
        (Method::Hadamard, 2048),
        (Method::Nystrom, 128),
        (Method::Nystrom, 1024),
    ] {
        let spec = FeatureSpec::new(exact.kernel().clone(), m, exact.input_dim(), f, 1);
        let (c, _) = teacher
            .distil(&spec, &RidgeGrid::fixed(1e-4), None, &Silent)
            .unwrap();
        pred.push(predict_compiled(&profile, &c).latency_us);
        meas.push(measure_single(calib.view(), 300, |r| c.decision_one(r)).p50_us);
    }
    let rho = spearman(&pred, &meas);
    assert!(
        rho >= 0.8,
        "Spearman {rho}: predicted {pred:?} measured {meas:?}"
    );
}

#[test]
fn machine_profile_round_trips_and_rejects_nonsense() {
    let p = MachineProfile::nominal();
    let back = MachineProfile::from_json(&p.to_json(), "mem").unwrap();
    assert_eq!(p, back);
    let bad = p
        .to_json()
        .replace("\"gemm_flops_per_ns\": 10.0", "\"gemm_flops_per_ns\": -1.0");
    assert!(MachineProfile::from_json(&bad, "mem").is_err());
    assert!(MachineProfile::from_json("{", "mem").is_err());
}

fn cut(dir: &Path, src: &str, n: usize) -> String {
    let p = dir.join(Path::new(src).file_name().unwrap());
    head_lines(&root().join(src), &p, n);
    s(&p).to_string()
}

#[test]
fn budgets_nothing_meets_write_nothing() {
    let d = tmpdir("budget_infeasible");
    let calib = cut(&d, "models/pump_calib.csv", 1500);
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("m.safetensors");
    // A latency no model reaches: exit 4, no file.
    let o = run(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--budget-us",
        "0.001",
        "--methods",
        "fourier,nystrom",
        "--out",
        s(&out),
    ]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(4), "{err}");
    assert!(err.contains("no model meets"), "{err}");
    // Said once: "no model meets the budget: a latency of 0.001 µs; no file written".
    assert_eq!(err.matches("no model meets").count(), 1, "{err}");
    assert!(
        err.contains("a latency of 0.001 µs; no file written"),
        "{err}"
    );
    assert!(String::from_utf8_lossy(&o.stdout).contains("predicted at"));
    assert!(!out.exists());
    // A size no model reaches.
    let o = run(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--max-bytes",
        "100",
        "--methods",
        "hadamard",
        "--out",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(4));
    assert!(!out.exists());
    // A generous latency budget the exact model itself meets: keep it (exit 5), no file.
    let o = run(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--budget-us",
        "1000000",
        "--methods",
        "fourier",
        "--out",
        s(&out),
    ]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert_eq!(o.status.code(), Some(5), "{text}");
    assert!(text.contains("the exact model itself meets"), "{text}");
    assert!(
        text.contains("without a fidelity bound nothing compiled can be more faithful"),
        "{text}"
    );
    assert!(!out.exists());
    // Compiled candidates that meet the latency and size but not the fidelity bound are
    // named as such, not as "no compiled model meets it".
    let small = cut(&d, "models/pump_calib.csv", 600);
    let o = run(&[
        "compile",
        s(&model),
        "--calib",
        &small,
        "--budget-us",
        "1000000",
        "--max-bytes",
        "300K",
        "--max-disagreement",
        "0.0001",
        "--methods",
        "fourier",
        "--out",
        s(&out),
    ]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert_eq!(o.status.code(), Some(5), "{text}");
    assert!(
        text.contains("compiled candidates built meet the latency and size but none the disagreement bound of 0.0001"),
        "{text}"
    );
    assert!(!out.exists());
    // No temporary files left behind.
    let left: Vec<_> = std::fs::read_dir(&d)
        .unwrap()
        .flatten()
        .filter(|e| e.file_name().to_string_lossy().contains(".tmp"))
        .collect();
    assert!(left.is_empty());
    // Budget flags and an explicit method do not mix.
    let err = bad(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--budget-us",
        "5",
        "--method",
        "fourier",
        "--features",
        "64",
        "--out",
        s(&out),
    ]);
    assert!(err.contains("drop --method"), "{err}");
}

#[test]
fn budget_compile_meets_the_latency_it_was_given() {
    let d = tmpdir("budget_ok");
    let calib = cut(&d, "models/pump_calib.csv", 2000);
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("m.safetensors");
    let json = d.join("r.json");
    let text = ok(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--budget-us",
        "8",
        "--methods",
        "hadamard,nystrom",
        "--out",
        s(&out),
        "--json",
        s(&json),
    ]);
    assert!(text.contains("chosen:"), "{text}");
    assert!(text.contains("re-measured single-row latency"), "{text}");
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    let t = r["latency_us_compiled_p50"].as_f64().unwrap();
    // The latency is measured, not asserted: a test never judges wall-clock time (the
    // search itself compares its measurement with the budget; benchmarks measure speed).
    assert!(t.is_finite() && t > 0.0);
}

/// With `--refine N` the budget search refines every candidate before judging it on the
/// audit rows: the chosen model carries its refinement record.
#[test]
fn budget_search_refines_its_candidates() {
    let d = tmpdir("budget_refine");
    let calib = cut(&d, "models/pump_calib.csv", 2000);
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("m.safetensors");
    let text = ok(&[
        "compile",
        s(&model),
        "--calib",
        &calib,
        "--max-disagreement",
        "0.1",
        "--methods",
        "hadamard",
        "--refine",
        "2",
        "--no-timing",
        "--out",
        s(&out),
    ]);
    assert!(text.contains("chosen:"), "{text}");
    let m = kernelpress::model::CompiledModel::load(&out).unwrap();
    let r = &m.fit["refine"];
    assert!(r["passes"].as_u64().unwrap() >= 1, "{}", m.fit);
}

/// Decodes a PNG's pixel bytes (all IDAT chunks inflated; filter bytes included).
fn png_pixels(path: &Path) -> Vec<u8> {
    use std::io::Read;
    let b = std::fs::read(path).unwrap();
    assert_eq!(&b[..8], b"\x89PNG\r\n\x1a\n", "not a PNG");
    let mut i = 8;
    let mut idat = Vec::new();
    while i + 8 <= b.len() {
        let len = u32::from_be_bytes(b[i..i + 4].try_into().unwrap()) as usize;
        let kind = &b[i + 4..i + 8];
        if kind == b"IDAT" {
            idat.extend_from_slice(&b[i + 8..i + 8 + len]);
        }
        i += 12 + len;
    }
    let mut out = Vec::new();
    flate2::read::ZlibDecoder::new(&idat[..])
        .read_to_end(&mut out)
        .unwrap();
    out
}

#[test]
fn sweep_writes_json_svg_and_a_page_a_browser_renders() {
    let d = tmpdir("sweep_page");
    let calib = cut(&d, "models/pump_calib.csv", 2000);
    let eval = cut(&d, "models/pump_test.csv", 600);
    let model = root().join("models/pump_svm.safetensors");
    let out = d.join("sweep");
    let text = ok(&[
        "sweep",
        s(&model),
        "--calib",
        &calib,
        "--eval",
        &eval,
        "--target",
        "condition",
        "--methods",
        "fourier,nystrom",
        "--features",
        "64,256",
        "--guard-agreement",
        "0.95",
        "--out",
        s(&out),
    ]);
    assert!(text.contains("recommended:"), "{text}");
    // sweep.json: one record per pair with every report key, plus the exact model.
    let j: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("sweep.json")).unwrap()).unwrap();
    let recs = j["records"].as_array().unwrap();
    let guarded: Vec<_> = recs
        .iter()
        .filter(|r| r["method"].as_str().unwrap().ends_with("+guard"))
        .collect();
    assert_eq!(recs.len(), 5 + guarded.len());
    assert!(!guarded.is_empty(), "no guarded points");
    for g in &guarded {
        assert_eq!(g["latency_basis"], "mean");
        let base = g["method"].as_str().unwrap().trim_end_matches("+guard");
        let plain = recs
            .iter()
            .find(|r| r["method"] == base && r["features"] == g["features"])
            .unwrap();
        assert!(
            g["agreement"].as_f64().unwrap() >= plain["agreement"].as_f64().unwrap(),
            "a guard cannot lower agreement: {g} vs {plain}"
        );
        let shares = g["stage_shares"].as_array().unwrap();
        assert!(shares[1].as_f64().unwrap() + shares[2].as_f64().unwrap() > 0.0);
    }
    let keys = [
        "agreement",
        "agreement_ci95",
        "decision_rmse",
        "kernel_rmse",
        "latency_us_compiled_p50",
        "throughput_rows_per_s_compiled",
        "bytes_compiled",
        "flops_compiled",
        "predicted_latency_us",
        "latency_prediction_error",
        "pareto",
        "loss",
    ];
    for r in recs
        .iter()
        .filter(|r| r["exact_model"] == false && !r["method"].as_str().unwrap().ends_with("+guard"))
    {
        for k in keys {
            assert!(!r[k].is_null(), "record lacks {k}: {r}");
        }
        let t = r["latency_us_compiled_p50"].as_f64().unwrap();
        assert!(t.is_finite() && t > 0.0);
    }
    let ex: Vec<_> = recs.iter().filter(|r| r["exact_model"] == true).collect();
    assert_eq!(ex.len(), 1);
    assert_eq!(ex[0]["method"], "exact");
    assert!(recs.iter().any(|r| r["pareto"] == true));
    // The SVG parses as XML (Python's standard parser) and has the plot's parts.
    let svg = out.join("sweep.svg");
    let o = py_inline(
        "import sys, xml.etree.ElementTree as E; r = E.parse(sys.argv[1]).getroot(); \
         print(r.tag, len(list(r.iter())))",
        &[s(&svg)],
    );
    assert!(o.starts_with("{http://www.w3.org/2000/svg}svg"), "{o}");
    let svg_text = std::fs::read_to_string(&svg).unwrap();
    for want in [
        "fourier",
        "nystrom",
        "Pareto front",
        "exact model",
        "latency",
    ] {
        assert!(svg_text.contains(want), "the picture lacks '{want}'");
    }
    // The page: self-contained (no scripts, no remote resources).
    let page = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(!page.contains("<script"));
    assert!(!page.contains("http://") || page.matches("http://").all(|_| page.contains("xmlns")));
    assert!(!page.contains("https://"));
    assert!(page.contains("<svg") && page.contains("Recommendation") && page.contains("Cautions"));
    // A real browser loads it with no console errors, and the screenshot is not blank.
    let shot = d.join("page.png");
    let profile = d.join("chromium-profile");
    let o = std::process::Command::new("chromium")
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--enable-logging=stderr",
            "--v=0",
            "--window-size=1200,1400",
            &format!("--user-data-dir={}", s(&profile)),
            &format!("--screenshot={}", s(&shot)),
            &format!("file://{}", s(&out.join("report.html"))),
        ])
        .output()
        .expect("chromium must be installed (scripts/test.sh installs Debian's chromium)");
    let log = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "chromium failed: {log}");
    let console: Vec<&str> = log.lines().filter(|l| l.contains("CONSOLE")).collect();
    assert!(console.is_empty(), "console messages: {console:?}");
    assert!(!log.contains("Uncaught"), "{log}");
    let px = png_pixels(&shot);
    let mut seen = [false; 256];
    for b in &px {
        seen[*b as usize] = true;
    }
    let distinct = seen.iter().filter(|s| **s).count();
    assert!(
        px.len() > 1000 && distinct > 20,
        "blank screenshot ({distinct} byte values)"
    );
}

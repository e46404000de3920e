//! A new user's first hour: columns matched by name, errors that point at the fix, the
//! compiled file's record of its exact model, the quality gate, a readable report,
//! progress in logs, self-describing score columns, and `train` without silent defaults.

mod common;
use common::*;
use std::process::Command;

fn demo() -> std::path::PathBuf {
    root().join("models/pump_svm.safetensors")
}

/// The demo test file with columns `a` and `b` swapped (header and values).
fn swapped(dir: &std::path::Path, n: usize) -> std::path::PathBuf {
    let text = std::fs::read_to_string(root().join("models/pump_test.csv")).unwrap();
    let mut out = String::new();
    for l in text.lines().take(n + 1) {
        let mut c: Vec<&str> = l.split(',').collect();
        c.swap(0, 3);
        out.push_str(&c.join(","));
        out.push('\n');
    }
    let p = dir.join("swapped.csv");
    std::fs::write(&p, out).unwrap();
    p
}

#[test]
fn columns_are_matched_by_name() {
    let dir = tmpdir("columns_are_matched_by_name");
    let test = root().join("models/pump_test.csv");
    let sw = swapped(&dir, 3000);
    let a = ok(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let b = ok(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&sw),
        "--target",
        "condition",
    ]);
    assert_eq!(a, b, "swapping two columns must not change any score");
    let c = ok(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&sw),
        "--target",
        "condition",
        "--by-position",
    ]);
    let changed = a
        .lines()
        .zip(c.lines())
        .filter(|(x, y)| x.split(',').next() != y.split(',').next())
        .count();
    assert!(
        changed > 500,
        "by position the swap changes labels ({changed})"
    );
    // Extra columns are ignored with a note; a missing one is an error naming it.
    let o = run(&["score", "--decisions", s(&demo()), "--data", s(&test)]);
    assert!(o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("ignored column 'condition'"), "{err}");
    let text = std::fs::read_to_string(&test).unwrap();
    let cut: String = text
        .lines()
        .take(5)
        .map(|l| l.split(',').skip(1).collect::<Vec<_>>().join(",") + "\n")
        .collect();
    let p = dir.join("cut.csv");
    std::fs::write(&p, cut).unwrap();
    let e = bad(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&p),
        "--target",
        "condition",
    ]);
    assert!(e.contains("'vib_rms' is missing"), "{e}");
    for (name, head) in [
        ("dup.csv", "a,a,c\n1,2,3\n"),
        ("empty.csv", "a,,c\n1,2,3\n"),
    ] {
        let p = dir.join(name);
        std::fs::write(&p, head).unwrap();
        let e = bad(&["score", "--decisions", s(&demo()), "--data", s(&p)]);
        assert!(
            e.contains("appears twice") || e.contains("has no name"),
            "{e}"
        );
    }
}

#[test]
fn errors_point_at_the_fix() {
    let dir = tmpdir("errors_point_at_the_fix");
    let test = root().join("models/pump_test.csv");
    let e = bad(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&test),
        "--by-position",
    ]);
    assert!(
        e.contains("'condition' is not one of the model's features")
            && e.contains("--target condition"),
        "{e}"
    );
    for (k, needle) in [
        ("gaussian(gama=1)", "did you mean 'gamma'"),
        ("gausian(gamma=1)", "did you mean 'gaussian'"),
        ("polynomial(degree=2, gama=1)", "did you mean 'gamma'"),
        (
            "gaussian(gamma=1) - linear()",
            "subtraction is not supported",
        ),
    ] {
        let e = bad(&["kernel-check", "--kernel", k, "--dim", "2"]);
        assert!(e.contains(needle), "{k}: {e}");
    }
    let p = dir.join("t.csv");
    std::fs::write(&p, "a,b,y\n1,2,x\n3,4,z\n").unwrap();
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "y",
        "--kernel",
        "linear()",
        "--model",
        "svm",
        "--out",
        s(&dir.join("m.safetensors")),
    ]);
    assert!(e.contains("--c C") && e.contains("--choose"), "{e}");
}

#[test]
fn compiled_files_know_their_exact_model() {
    let dir = tmpdir("compiled_files_know_their_exact_model");
    let train = dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 300);
    let other = dir.join("other.safetensors");
    ok(&[
        "train",
        "--data",
        s(&train),
        "--target",
        "condition",
        "--kernel",
        "laplacian(gamma=0.2)",
        "--model",
        "svm",
        "--c",
        "1",
        "--standardize",
        "--out",
        s(&other),
    ]);
    let c = root().join("models/pump_compiled.safetensors");
    let test = root().join("models/pump_test.csv");
    let e = bad(&[
        "report",
        s(&c),
        "--exact",
        s(&other),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
    ]);
    assert!(
        e.contains("different exact model") && e.contains("--any-exact"),
        "{e}"
    );
    ok(&[
        "report",
        s(&c),
        "--exact",
        s(&other),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
        "--any-exact",
    ]);
    ok(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
    ]);
}

#[test]
fn quality_gate_stops_a_pipeline() {
    let dir = tmpdir("quality_gate_stops_a_pipeline");
    let calib = dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 600);
    let out = dir.join("c.safetensors");
    let args = |extra: &[&str]| {
        let mut v: Vec<String> = [
            "compile",
            s(&demo()),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            "fourier",
            "--features",
            "32",
            "--no-timing",
            "--out",
            s(&out),
        ]
        .iter()
        .map(|x| x.to_string())
        .collect();
        v.extend(extra.iter().map(|x| x.to_string()));
        v
    };
    let run_args = |v: Vec<String>| {
        let r: Vec<&str> = v.iter().map(|x| x.as_str()).collect();
        run(&r)
    };
    // No gate given: a warning, exit 0.
    let o = run_args(args(&[]));
    assert_eq!(o.status.code(), Some(0));
    assert!(String::from_utf8_lossy(&o.stderr).contains("warning: label agreement"));
    std::fs::remove_file(&out).unwrap();
    // A gate: exit 3, the file still written (for inspection).
    let o = run_args(args(&["--min-agreement", "0.9999"]));
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("quality gate failed"));
    assert!(out.exists());
    std::fs::remove_file(&out).unwrap();
    let o = run_args(args(&["--min-agreement", "0.9999", "--discard-below-gate"]));
    assert_eq!(o.status.code(), Some(3));
    assert!(!out.exists());
    let o = run_args(args(&["--min-accuracy", "0.1"]));
    assert_eq!(o.status.code(), Some(0));
    // report has the same gate.
    let c = root().join("models/pump_compiled.safetensors");
    let test = root().join("models/pump_test.csv");
    let o = run(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
        "--min-agreement",
        "1",
    ]);
    assert_eq!(o.status.code(), Some(3));
    let o = run(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
        "--min-accuracy",
        "0.5",
    ]);
    assert_eq!(o.status.code(), Some(0));
}

#[test]
fn the_report_reads_like_a_report() {
    let dir = tmpdir("the_report_reads_like_a_report");
    let c = root().join("models/pump_compiled.safetensors");
    let test = root().join("models/pump_test.csv");
    let j = dir.join("r.json");
    let text = ok(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--reps",
        "30",
        "--json",
        s(&j),
    ]);
    for needle in [
        "0.9950 (95% interval 0.9918–0.9970)",
        "share of rows given the same label",
        " KiB",
        " µs",
        "rows/s",
        "decisions that change",
    ] {
        assert!(text.contains(needle), "missing '{needle}' in\n{text}");
    }
    // Speed ratios in words that mean what they say: never "0.9× faster".
    assert!(
        text.contains("× faster") || text.contains("× slower"),
        "{text}"
    );
    for w in text.split_whitespace().filter(|w| w.ends_with('×')) {
        if let Ok(v) = w.trim_end_matches('×').parse::<f64>() {
            assert!(
                v >= 1.0 || text.contains("the kernel's bandwidth"),
                "ratio {w} in\n{text}"
            );
        }
    }
    assert!(!text.contains("—"));
    let r: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&j).unwrap()).unwrap();
    let changed: u64 = r["changed_decisions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["rows"].as_u64().unwrap())
        .sum();
    let n = r["n_rows"].as_f64().unwrap();
    let agree = r["agreement"].as_f64().unwrap();
    assert_eq!(changed as f64, (n * (1.0 - agree)).round());
    for key in [
        "latency_us_exact_p50",
        "latency_us_compiled_p50",
        "latency_us_compiled_p99",
        "throughput_rows_per_s_exact",
        "throughput_rows_per_s_compiled",
        "speedup_single",
        "speedup_batch",
    ] {
        let v = r[key].as_f64().unwrap_or(f64::NAN);
        assert!(v.is_finite() && v > 0.0, "{key}: {}", r[key]);
    }
    let quiet = ok(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--no-timing",
    ]);
    assert!(!quiet.contains("µs") && quiet.contains("latency not measured"));
}

#[test]
fn progress_shows_in_logs_and_quiet_silences_it() {
    let dir = tmpdir("progress_shows_in_logs_and_quiet_silences_it");
    let calib = root().join("models/pump_calib.csv");
    let out = dir.join("c.safetensors");
    let model = demo();
    let args = [
        "compile",
        s(&model),
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
    ];
    let o = Command::new(bin()).args(args).output().unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("[kernelpress] distilling: started") && err.contains("done in"),
        "{err}"
    );
    let o = Command::new(bin())
        .arg("--quiet")
        .args(args)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!err.contains("[kernelpress]"), "{err}");
}

#[test]
fn score_columns_say_which_class_a_positive_value_favours() {
    let test = root().join("models/pump_test.csv");
    let o = ok(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let head: Vec<&str> = o.lines().next().unwrap().split(',').collect();
    assert_eq!(head[0], "label");
    assert_eq!(head[6], "decision_bearing_wear_vs_healthy");
    assert_eq!(head[11], "decision_imbalance_vs_misalignment");
    // The rule: a positive decision_A_vs_B is a vote for A; the label has the most votes.
    for line in o.lines().skip(1).take(200) {
        let v: Vec<&str> = line.split(',').collect();
        let mut votes = std::collections::HashMap::new();
        for (c, name) in head.iter().enumerate().skip(6) {
            let pair = name.trim_start_matches("decision_");
            let (a, b) = pair.split_once("_vs_").unwrap();
            let x: f64 = v[c].parse().unwrap();
            *votes.entry(if x > 0.0 { a } else { b }).or_insert(0) += 1;
        }
        let most = votes.values().max().unwrap();
        assert_eq!(votes[v[0]], *most, "{line}");
    }
}

#[test]
fn train_chooses_c_when_asked_and_prints_the_grid() {
    let dir = tmpdir("train_chooses_c_when_asked_and_prints_the_grid");
    let train = dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 300);
    let out = dir.join("m.safetensors");
    let o = ok(&[
        "train",
        "--data",
        s(&train),
        "--target",
        "condition",
        "--kernel",
        "gaussian(gamma=0.25)",
        "--model",
        "svm",
        "--choose",
        "--standardize",
        "--out",
        s(&out),
    ]);
    assert!(
        o.contains("held-out accuracy") && o.contains("chosen: C ="),
        "{o}"
    );
    assert_eq!(
        o.lines()
            .filter(|l| l.trim_start().starts_with("C = "))
            .count(),
        15
    );
    // Each grid line's words match its kernel: γ ×2 is a larger γ, a narrower kernel.
    for l in o.lines().filter(|l| l.trim_start().starts_with("C = ")) {
        let gamma: f64 = l
            .split("gamma=")
            .nth(1)
            .unwrap()
            .trim_end_matches(')')
            .parse()
            .unwrap();
        let word = if gamma > 0.25 {
            "γ ×2 (narrower"
        } else if gamma < 0.25 {
            "γ ×0.5 (wider"
        } else {
            "γ ×1 (as given"
        };
        assert!(l.contains(word), "{l}");
        assert!(!l.contains("width"), "{l}");
    }
    let j: serde_json::Value = serde_json::from_str(&ok(&["inspect", s(&out), "--json"])).unwrap();
    assert_eq!(
        j["manifest"]["training"]["grid"].as_array().unwrap().len(),
        15
    );
}

#[test]
fn kernel_check_columns_line_up() {
    let o = ok(&[
        "kernel-check",
        "--kernel",
        "gaussian(gamma=1)",
        "--dim",
        "3",
    ]);
    for l in o.lines() {
        assert!(l.len() > 22, "{l}");
        let (label, value) = l.split_at(22);
        assert!(
            !label.trim().is_empty() && !value.starts_with(' '),
            "misaligned: {l}"
        );
    }
}

/// Parses `score` CSV output (no quoted fields) into a header and rows.
fn parse_csv(text: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let mut lines = text.lines();
    let head = lines.next().unwrap().split(',').map(String::from).collect();
    let rows = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    (head, rows)
}

#[test]
fn score_shows_the_label_then_one_column_per_class() {
    let dir = tmpdir("score_shows_the_label_then_one_column_per_class");
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 400);
    let plain = ok(&[
        "score",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    let (h, rows) = parse_csv(&plain);
    let classes = ["bearing_wear", "healthy", "imbalance", "misalignment"];
    let mut want = vec!["label".to_string(), "margin".to_string()];
    want.extend(classes.iter().map(|c| format!("wins_{c}")));
    assert_eq!(h, want, "no pairwise columns by default");
    // The raw decisions behind --decisions, in the documented pair order.
    let full = ok(&[
        "score",
        s(&demo()),
        "--data",
        s(&test),
        "--target",
        "condition",
        "--decisions",
    ]);
    let (hf, full_rows) = parse_csv(&full);
    assert_eq!(&hf[..6], &want[..]);
    assert_eq!(hf[6], "decision_bearing_wear_vs_healthy");
    assert_eq!(hf[11], "decision_imbalance_vs_misalignment");
    assert_eq!(rows.len(), 400);
    let mut lost_a_contest = 0;
    for (r, f) in rows.iter().zip(&full_rows) {
        assert_eq!(r[..], f[..6]);
        // Recompute the class columns from the pairwise decisions by the rule the help
        // states: positive favours the first class of the pair; most wins, ties to the
        // earlier label; margin = the winner's closest contest, signed for the winner.
        let d: Vec<f64> = f[6..12].iter().map(|v| v.parse().unwrap()).collect();
        let mut wins = [0usize; 4];
        let pairs = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)];
        for (p, &(i, j)) in pairs.iter().enumerate() {
            wins[if d[p] > 0.0 { i } else { j }] += 1;
        }
        let win = (0..4).fold(0, |b, c| if wins[c] > wins[b] { c } else { b });
        assert_eq!(r[0], classes[win]);
        for c in 0..4 {
            assert_eq!(r[2 + c].parse::<f64>().unwrap(), wins[c] as f64);
        }
        let margin = pairs
            .iter()
            .enumerate()
            .filter(|(_, &(i, j))| i == win || j == win)
            .map(|(p, &(i, _))| if i == win { d[p] } else { -d[p] })
            .fold(f64::INFINITY, f64::min);
        assert_eq!(r[1].parse::<f64>().unwrap(), margin);
        lost_a_contest += usize::from(margin < 0.0);
        assert_eq!(wins.iter().sum::<usize>(), 6);
    }
    // Noisy demo rows: some winners lose a contest and still win (the margin says so).
    assert!(lost_a_contest < 400);
}

#[test]
fn a_misspelt_target_is_an_error_naming_the_closest_column() {
    let e = bad(&[
        "score",
        s(&demo()),
        "--data",
        s(&root().join("models/pump_test.csv")),
        "--target",
        "conditon",
    ]);
    assert!(
        e.contains("target column 'conditon' not found") && e.contains("did you mean 'condition'?"),
        "{e}"
    );
    let e = bad(&[
        "report",
        s(&root().join("models/pump_compiled.safetensors")),
        "--exact",
        s(&demo()),
        "--data",
        s(&root().join("models/pump_test.csv")),
        "--target",
        "conditon",
        "--min-accuracy",
        "0.5",
        "--no-timing",
    ]);
    assert!(e.contains("did you mean 'condition'?"), "{e}");
}

#[test]
fn every_method_is_in_the_help_and_a_misspelt_one_gets_a_suggestion() {
    let help = ok(&["compile", "--help"]);
    for m in kernelpress::features::Method::all() {
        assert!(help.contains(m.name()), "compile --help omits {}", m.name());
    }
    let e = bad(&[
        "featurize",
        "--kernel",
        "gaussian(gamma=1)",
        "--method",
        "tayler",
        "--features",
        "10",
        "--data",
        s(&root().join("models/pump_test.csv")),
        "--target",
        "condition",
        "--out",
        "/tmp/never-written.npy",
    ]);
    assert!(e.contains("did you mean 'taylor'?"), "{e}");
    let e = bad(&[
        "export",
        s(&root().join("models/pump_compiled.safetensors")),
        "--format",
        "onxx",
        "--out",
        "/tmp/never-written.onnx",
    ]);
    assert!(e.contains("did you mean 'onnx'?"), "{e}");
}

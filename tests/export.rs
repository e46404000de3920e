//! Exports proven against outside runtimes: onnx's checker and onnxruntime, gcc for the C
//! export, rustc for the Rust export, numpy for the plain weights; precision checks
//! recomputed in numpy.

mod common;
use common::*;
use kernelpress::model::CompiledModel;
use std::path::{Path, PathBuf};
use std::process::Command;

struct Data {
    dir: PathBuf,
    test: PathBuf,
}

fn data(name: &str) -> Data {
    let dir = tmpdir(name);
    let test = dir.join("test.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 200);
    Data { dir, test }
}

/// Compiled models covering every method (teacher mode for the Gaussian methods, labels
/// mode for the others), as (name, path): compiled once per test run (the tests of this
/// file share them, read-only) into their own folder.
fn models(_: &Data) -> Vec<(String, PathBuf)> {
    static MODELS: std::sync::OnceLock<Vec<(String, PathBuf)>> = std::sync::OnceLock::new();
    MODELS
        .get_or_init(|| {
            let d = data("export_models_shared");
            build_models(&d)
        })
        .clone()
}

fn build_models(d: &Data) -> Vec<(String, PathBuf)> {
    let calib = d.dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 800);
    let train = d.dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 600);
    let exact = root().join("models/pump_svm.safetensors");
    let mut out = Vec::new();
    for (method, features, extra) in [
        ("fourier", "128", vec!["--variant", "phase"]),
        ("orthogonal", "128", vec![]),
        ("hadamard", "128", vec![]),
        ("fastfood", "128", vec![]),
        ("quasi", "128", vec![]),
        ("nystrom", "96", vec![]),
        ("taylor", "165", vec![]),
        // Refined maps (continuous diagonals, moved landmarks) export like any other.
        ("hadamard", "128", vec!["--refine", "2"]),
        ("nystrom", "96", vec!["--refine", "2"]),
        // A factored head: a trailing D × r projection, then an r × outputs head.
        ("hadamard", "128", vec!["--head-rank", "3"]),
    ] {
        let name = if extra.contains(&"--refine") {
            format!("{method}_refined")
        } else if extra.contains(&"--head-rank") {
            format!("{method}_factored")
        } else {
            method.to_string()
        };
        let p = d.dir.join(format!("{name}.safetensors"));
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
            "--no-timing",
            "--out",
            s(&p),
        ];
        args.extend(extra);
        ok(&args);
        out.push((name, p));
    }
    for (name, kernel, method) in [
        ("maclaurin", "polynomial(degree=2, gamma=0.2, offset=1)", "maclaurin"),
        ("tensorsketch", "polynomial(degree=2, gamma=0.3, offset=1)", "tensorsketch"),
        ("relu", "arccos(order=1)", "relu"),
        ("step", "arccos(order=0)", "relu"),
        ("identity", "linear()", "identity"),
        ("sum", "laplacian(gamma=0.3) + 0.5 * linear()", "fourier"),
        ("product", "gaussian(gamma=0.2) * linear()", "fourier"),
        (
            "landmarks",
            "matern(nu=1.5, lengthscale=2) + sigmoid(gamma=0.05, offset=0) * rational_quadratic(alpha=2, lengthscale=3)",
            "nystrom",
        ),
        ("arccos_landmarks", "2 * arccos(order=1) + polynomial(degree=2, gamma=0.1, offset=1)", "nystrom"),
    ] {
        let p = d.dir.join(format!("{name}.safetensors"));
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
            "128",
            "--seed",
            "4",
            "--out",
            s(&p),
        ]);
        out.push((name.to_string(), p));
    }
    // A regression model and a binary one.
    let reg = d.dir.join("train_reg.csv");
    let text = std::fs::read_to_string(&train).unwrap();
    let mut t = String::new();
    for (i, l) in text.lines().enumerate() {
        let cells: Vec<&str> = l.split(',').collect();
        let last = cells.len() - 1;
        let y = if i == 0 {
            "condition".to_string()
        } else {
            format!(
                "{}",
                cells[0].parse::<f64>().unwrap() * 0.5 + cells[1].parse::<f64>().unwrap()
            )
        };
        t.push_str(&format!("{},{y}\n", cells[..last].join(",")));
    }
    std::fs::write(&reg, t).unwrap();
    let p = d.dir.join("regression.safetensors");
    ok(&[
        "compile",
        "--kernel",
        "gaussian(gamma=0.1)",
        "--data",
        s(&reg),
        "--target",
        "condition",
        "--regression",
        "--standardize",
        "--method",
        "orthogonal",
        "--features",
        "64",
        "--out",
        s(&p),
    ]);
    out.push(("regression".into(), p));
    let bin = d.dir.join("train_bin.csv");
    let text = std::fs::read_to_string(&train).unwrap();
    let t: String = text
        .lines()
        .map(|l| {
            // A label with a trigraph (`??/` reads as a backslash under -std=c99).
            l.replace("imbalance", "faulty??/")
                .replace("misalignment", "faulty??/")
                .replace("bearing_wear", "faulty??/")
                + "\n"
        })
        .collect();
    std::fs::write(&bin, t).unwrap();
    let p = d.dir.join("binary.safetensors");
    ok(&[
        "compile",
        "--kernel",
        "gaussian(gamma=0.1)",
        "--data",
        s(&bin),
        "--target",
        "condition",
        "--standardize",
        "--method",
        "hadamard",
        "--features",
        "64",
        "--out",
        s(&p),
    ]);
    out.push(("binary".into(), p));
    out
}

fn score(d: &Data, model: &Path, name: &str) -> PathBuf {
    let sc = d.dir.join(format!("score_{name}.csv"));
    ok(&[
        "score",
        "--decisions",
        s(model),
        "--data",
        s(&d.test),
        "--target",
        "condition",
        "--out",
        s(&sc),
    ]);
    sc
}

#[test]
fn onnx_export_runs_in_onnxruntime_for_every_method() {
    let d = data("onnx_export_runs_in_onnxruntime_for_every_method");
    for (name, m) in models(&d) {
        let sc = score(&d, &m, &name);
        let onnx = d.dir.join(format!("{name}.onnx"));
        let o = ok(&["export", s(&m), "--format", "onnx", "--out", s(&onnx)]);
        assert!(o.contains("wrote"), "{o}");
        let r = py(
            "onnx_check.py",
            &[s(&onnx), s(&m), s(&d.test), "condition", s(&sc)],
        );
        eprint!("{name}: {r}");
    }
}

/// Rows of the test data as whitespace-separated numbers (features only).
fn numbers(test: &Path) -> String {
    let t = kernelpress::data::read_table(test, Some("condition"), false).unwrap();
    let mut s = String::new();
    for r in t.x.rows() {
        for v in r {
            s.push_str(&format!("{v} "));
        }
        s.push('\n');
    }
    s
}

/// Compares a program's printed decisions (one row per line: k values then a label index)
/// with `score`, within the f32 bound of the onnx check.
fn compare(model: &Path, sc: &Path, printed: &str, test: &Path) {
    let m = CompiledModel::load(model).unwrap();
    let t = kernelpress::data::read_table(test, Some("condition"), false).unwrap();
    let want = m.decision(t.x.view());
    let xs = match m.scaling() {
        Some(s) => s.apply(t.x.view()),
        None => t.x.clone(),
    };
    let z = m.program().apply(xs.view());
    let scale = z
        .mapv(f64::abs)
        .dot(&m.head().mapv(f64::abs))
        .iter()
        .fold(0.0f64, |a, v| a.max(*v));
    let dmax = want.iter().fold(1.0f64, |a, v| a.max(v.abs()));
    let tol = 1e-4 * dmax + 64.0 * 2f64.powi(-24) * scale;
    let labels = std::fs::read_to_string(sc).unwrap();
    let score_labels: Vec<String> = labels
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap().to_string())
        .collect();
    let k = m.n_outputs();
    let mut worst = 0.0f64;
    for (i, line) in printed.lines().enumerate() {
        let v: Vec<f64> = line
            .split_whitespace()
            .map(|t| t.parse().unwrap())
            .collect();
        assert_eq!(v.len(), k + 1, "line {i}: {line}");
        for c in 0..k {
            worst = worst.max((v[c] - want[[i, c]]).abs());
        }
        if m.task().is_classifier() {
            let li = v[k] as usize;
            let near = want.row(i).iter().any(|x| x.abs() <= tol);
            assert!(
                m.labels()[li] == score_labels[i] || near,
                "row {i}: label {} vs {}",
                m.labels()[li],
                score_labels[i]
            );
        }
    }
    assert_eq!(printed.lines().count(), want.nrows());
    assert!(
        worst <= tol,
        "{}: max |Δ| {worst:e} > {tol:e}",
        model.display()
    );
    eprintln!("{}: max |Δ| {worst:.3e} (tol {tol:.3e})", model.display());
}

/// Builds `dir/main.c` (written from `main`) with `dir/kp_model.c` by gcc as warning-free
/// C99; returns the program.
fn gcc_build(dir: &Path, main: &str, what: &str) -> PathBuf {
    std::fs::write(dir.join("main.c"), main).unwrap();
    let exe = dir.join("score");
    let o = Command::new("gcc")
        .args(["-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-o"])
        .arg(&exe)
        .arg(dir.join("main.c"))
        .arg(dir.join("kp_model.c"))
        .arg("-lm")
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "{what}: gcc failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    exe
}

/// Builds `dir/main.rs` (written from `main`, which includes `model.rs`) by rustc under
/// `-D warnings`; returns the program.
fn rustc_build(dir: &Path, main: &str, what: &str) -> PathBuf {
    std::fs::write(dir.join("main.rs"), main).unwrap();
    let exe = dir.join("score");
    let o = Command::new("rustc")
        .args(["--edition", "2021", "-D", "warnings", "-O", "-o"])
        .arg(&exe)
        .arg(dir.join("main.rs"))
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "{what}: rustc failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    exe
}

fn gcc_available() -> bool {
    Command::new("gcc").arg("--version").output().is_ok()
}

#[test]
fn c_export_compiles_warning_free_and_matches_score() {
    assert!(
        gcc_available(),
        "gcc is needed for this test (Debian package gcc)"
    );
    let d = data("c_export_compiles_warning_free_and_matches_score");
    let input = numbers(&d.test);
    for (name, m) in models(&d) {
        if name == "tensorsketch" {
            let e = bad(&[
                "export",
                s(&m),
                "--format",
                "c",
                "--out",
                s(&d.dir.join("ts_c")),
            ]);
            assert!(e.contains("onnx"), "{e}");
            assert!(!d.dir.join("ts_c").exists());
            continue;
        }
        let sc = score(&d, &m, &name);
        let out = d.dir.join(format!("c_{name}"));
        let prefix = if name == "hadamard" { "pump" } else { "kp" };
        ok(&[
            "export",
            s(&m),
            "--format",
            "c",
            "--prefix",
            prefix,
            "--out",
            s(&out),
        ]);
        let cm = CompiledModel::load(&m).unwrap();
        let label_line = if cm.task().is_classifier() {
            format!("if ({prefix}_label_name(li) == NULL) return 1;")
        } else {
            String::new()
        };
        let names_line = if cm.task().is_classifier() {
            format!(
                "for (int c = 0; c < {}; c++) printf(\"%s|\", {prefix}_label_name(c));",
                cm.labels().len()
            )
        } else {
            String::new()
        };
        let upper = prefix.to_uppercase();
        let exe = gcc_build(&out, &format!(
                "#include <stdio.h>\n#include \"kp_model.h\"\nint main(void) {{\n    float x[64], out[64];\n    int d = {prefix}_input_dim(), k = {prefix}_output_dim();\n    static const char *const cols[] = {upper}_INPUT_NAMES;\n    printf(\"#\");\n    for (int j = 0; j < d; j++) printf(\"%s|%s|\", cols[j], {prefix}_input_name(j));\n    {names_line}\n    printf(\"\\n\");\n    for (;;) {{\n        for (int j = 0; j < d; j++) if (scanf(\"%f\", &x[j]) != 1) return 0;\n        {prefix}_decision(x, out);\n        int li = {prefix}_label_index(x);\n        {label_line}\n        for (int c = 0; c < k; c++) printf(\"%.9g \", out[c]);\n        printf(\"%d\\n\", li);\n    }}\n}}\n"
            ), &name);
        let printed = run_with_stdin(&exe, &input);
        let printed = check_names(&cm, &printed, true);
        compare(&m, &sc, &printed, &d.test);
    }
}

/// The first printed line (`#` then the names the artefact carries) against the model's
/// columns (each twice in C: the header's initializer and the accessor) and labels; returns
/// the rest.
fn check_names(m: &CompiledModel, printed: &str, twice: bool) -> String {
    let (first, rest) = printed.split_once('\n').unwrap();
    let mut want = String::from("#");
    for c in &m.feature_names {
        want.push_str(&format!("{c}|"));
        if twice {
            want.push_str(&format!("{c}|"));
        }
    }
    for l in m.labels() {
        want.push_str(&format!("{l}|"));
    }
    assert_eq!(first, want, "names carried by the export");
    rest.to_string()
}

fn run_with_stdin(exe: &Path, input: &str) -> String {
    use std::io::Write;
    let mut child = Command::new(exe)
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let o = child.wait_with_output().unwrap();
    assert!(o.status.success(), "{} failed", exe.display());
    String::from_utf8(o.stdout).unwrap()
}

#[test]
fn rust_export_builds_with_deny_warnings_and_matches_score() {
    let d = data("rust_export_builds_with_deny_warnings_and_matches_score");
    let input = numbers(&d.test);
    for (name, m) in models(&d) {
        if name == "tensorsketch" {
            continue;
        }
        let sc = score(&d, &m, &name);
        let dir = d.dir.join(format!("rs_{name}"));
        std::fs::create_dir_all(&dir).unwrap();
        ok(&[
            "export",
            s(&m),
            "--format",
            "rust",
            "--out",
            s(&dir.join("model.rs")),
        ]);
        let exe = rustc_build(&dir, "#[path = \"model.rs\"]\nmod model;\nuse std::io::Read;\nfn main() {\n    let mut s = String::new();\n    std::io::stdin().read_to_string(&mut s).unwrap();\n    let v: Vec<f32> = s.split_whitespace().map(|t| t.parse().unwrap()).collect();\n    let (d, k) = (model::input_dim(), model::output_dim());\n    let mut names = String::from(\"#\");\n    for c in model::INPUT_NAMES.iter().chain(model::LABEL_NAMES.iter()) {\n        names.push_str(c);\n        names.push(\'|\');\n    }\n    println!(\"{names}\");\n    let mut out = vec![0.0_f32; k];\n    for row in v.chunks(d) {\n        model::decision(row, &mut out);\n        let li = model::label_index(row);\n        let _ = model::label_name(li);\n        let cells: Vec<String> = out.iter().map(|x| format!(\"{x:e}\")).collect();\n        println!(\"{} {li}\", cells.join(\" \"));\n    }\n}\n", &name);
        let printed = run_with_stdin(&exe, &input);
        let printed = check_names(&CompiledModel::load(&m).unwrap(), &printed, false);
        compare(&m, &sc, &printed, &d.test);
    }
}

#[test]
fn plain_weights_score_in_numpy_and_precision_costs_match() {
    let d = data("plain_weights_score_in_numpy_and_precision_costs_match");
    let ms = models(&d);
    for (name, m) in ms.iter().filter(|(n, _)| {
        [
            "hadamard",
            "nystrom",
            "maclaurin",
            "taylor",
            "relu",
            "tensorsketch",
        ]
        .contains(&n.as_str())
    }) {
        let sc = score(&d, m, name);
        for precision in ["f32", "f16", "int8"] {
            let dir = d.dir.join(format!("npy_{name}_{precision}"));
            let sum = d.dir.join(format!("sum_{name}_{precision}.json"));
            ok(&[
                "export",
                s(m),
                "--format",
                "npy",
                "--precision",
                precision,
                "--check-data",
                s(&d.test),
                "--target",
                "condition",
                "--summary",
                s(&sum),
                "--out",
                s(&dir),
            ]);
            let st = d.dir.join(format!("w_{name}_{precision}.safetensors"));
            ok(&[
                "export",
                s(m),
                "--format",
                "safetensors",
                "--precision",
                precision,
                "--out",
                s(&st),
            ]);
            let r = py(
                "weights_check.py",
                &[s(&dir), s(&st), s(&d.test), "condition", s(&sc), s(&sum)],
            );
            eprint!("{name} {precision}: {r}");
        }
    }
}

#[test]
fn bad_exports_are_refused_with_nothing_written() {
    let d = data("bad_exports_are_refused_with_nothing_written");
    let m = root().join("models/pump_compiled.safetensors");
    let out = d.dir.join("x.onnx");
    let e = bad(&["export", s(&m), "--format", "tflite", "--out", s(&out)]);
    assert!(e.contains("onnx, c, rust, npy or safetensors"), "{e}");
    let e = bad(&[
        "export",
        s(&m),
        "--format",
        "onnx",
        "--precision",
        "f8",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("f32, f16 or int8"), "{e}");
    let e = bad(&[
        "export",
        s(&m),
        "--format",
        "c",
        "--prefix",
        "9lives",
        "--out",
        s(&d.dir.join("c")),
    ]);
    assert!(e.contains("C identifier"), "{e}");
    let e = bad(&[
        "export",
        s(&root().join("models/pump_svm.safetensors")),
        "--format",
        "onnx",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("expected a compiled model"), "{e}");
    assert!(!out.exists() && !d.dir.join("c").exists());
}

#[test]
fn onnx_svms_import_and_score_like_onnxruntime() {
    let dir = tmpdir("onnx_svms_import_and_score_like_onnxruntime");
    py("onnx_svm.py", &["make", s(&dir)]);
    let mut n = 0;
    for e in std::fs::read_dir(&dir).unwrap() {
        let p = e.unwrap().path();
        let name = p.file_stem().unwrap().to_string_lossy().to_string();
        if p.extension().is_none_or(|x| x != "onnx") {
            continue;
        }
        let model = dir.join(format!("{name}.safetensors"));
        if name.starts_with("bad_") {
            let err = bad(&["import", "--onnx", s(&p), "--out", s(&model)]);
            let needle = match name.as_str() {
                "bad_coefficients" => "'coefficients'",
                "bad_prob_a" => "'prob_a'",
                "bad_post_transform" => "post_transform 'SOFTMAX'",
                _ => "not an ONNX model",
            };
            assert!(err.contains(needle) && err.contains(&name), "{name}: {err}");
            assert!(!model.exists());
            continue;
        }
        ok(&["import", "--onnx", s(&p), "--out", s(&model)]);
        ok(&[
            "score",
            "--decisions",
            s(&model),
            "--data",
            s(&dir.join(format!("{name}_x.csv"))),
            "--out",
            s(&dir.join(format!("{name}_score.csv"))),
        ]);
        n += 1;
    }
    assert!(n >= 20, "{n} cases");
    let out = py("onnx_svm.py", &["check", s(&dir)]);
    eprint!("{out}");
}

#[test]
fn onnx_import_follows_the_wiring_and_the_operator_definitions() {
    // Each case as onnx.checker and onnxruntime see it: the valid file scores as
    // onnxruntime scores it (a Scaler not on the SVM's input is ignored, not applied); every
    // file they refuse is refused (exit 2, one line, nothing written).
    let dir = tmpdir("onnx_wiring");
    let verdict: serde_json::Value =
        serde_json::from_str(py("onnx_wiring.py", &[s(&dir)]).trim()).unwrap();
    let obj = verdict.as_object().unwrap();
    assert_eq!(obj["unwired"], "ok");
    for (case, v) in obj {
        let model = dir.join(format!("{case}.safetensors"));
        let src = dir.join(format!("{case}.onnx"));
        if v == "ok" {
            ok(&["import", "--onnx", s(&src), "--out", s(&model)]);
            let sc = ok(&["score", s(&model), "--data", s(&dir.join("x.csv"))]);
            let want = std::fs::read_to_string(dir.join("unwired_labels.txt")).unwrap();
            let got: Vec<&str> = sc
                .lines()
                .skip(1)
                .map(|l| l.split(',').next().unwrap())
                .collect();
            let want: Vec<&str> = want.lines().collect();
            assert_eq!(got.len(), 200);
            let same = got.iter().zip(&want).filter(|(a, b)| a == b).count();
            assert!(same >= 199, "{case}: {same} of 200 labels as onnxruntime");
        } else {
            let e = bad(&["import", "--onnx", s(&src), "--out", s(&model)]);
            assert!(!model.exists(), "{case}: {e}");
        }
    }
    assert!(obj.len() >= 8);
}

/// Guarded models (the weak 64-feature Fourier stage of the demo, so that many rows fall
/// back), under both rules, export whole: onnxruntime and numpy (tests/reference/
/// guarded_check.py), gcc-built C and rustc-built Rust give `score`'s label and stage on
/// every row of the test set; `--stage compact` exports the compiled stage alone.
#[test]
fn guarded_models_export_whole_and_answer_like_score() {
    use kernelpress::model::guarded::STAGES;
    use kernelpress::model::GuardedModel;
    let d = data("guarded_models_export_whole_and_answer_like_score");
    let calib = d.dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let exact = root().join("models/pump_svm.safetensors");
    let input = numbers(&d.test);
    let t = kernelpress::data::read_table(&d.test, Some("condition"), false).unwrap();
    // "all": every row to the exact model (--guard-rate 1), whose exports skip the
    // compiled stage.
    for rule in ["row", "pairs", "all"] {
        let m = d.dir.join(format!("g_{rule}.safetensors"));
        let (flag, value, r) = match rule {
            "all" => ("--guard-rate", "1", "row"),
            r => ("--guard-agreement", "0.98", r),
        };
        ok(&[
            "compile",
            s(&exact),
            "--calib",
            s(&calib),
            "--target",
            "condition",
            "--method",
            "fourier",
            "--features",
            "64",
            flag,
            value,
            "--guard-rule",
            r,
            "--no-timing",
            "--out",
            s(&m),
        ]);
        let g = GuardedModel::load(&m).unwrap();
        let (want, stage) = g.decision(t.x.view());
        let labels = g.labels_of(want.view());
        let sent = stage.iter().filter(|&&s| s != 0).count() as f64 / stage.len() as f64;
        assert!(sent >= 0.05, "{rule}: only {sent} of rows fall back");
        let k = g.compact().n_outputs();
        // Rows whose compiled confidence or exact decision is within f32 rounding of the
        // threshold or of zero may legitimately answer otherwise in f32.
        let (s32, _) = g.decision_f32(t.x.view());
        let near: Vec<bool> = (0..want.nrows())
            .map(|i| {
                let tol = 1e-4 * want.row(i).iter().fold(1.0f64, |a, v| a.max(v.abs()));
                want.row(i).iter().any(|v| v.abs() <= tol)
                    || s32
                        .row(i)
                        .iter()
                        .any(|v| (v.abs() - g.threshold()).abs() <= tol)
            })
            .collect();
        let check_printed = |printed: &str, what: &str| {
            let lines: Vec<&str> = printed.lines().collect();
            assert_eq!(lines.len(), want.nrows(), "{what}");
            let mut worst = 0.0f64;
            for (i, line) in lines.iter().enumerate() {
                let v: Vec<f64> = line
                    .split_whitespace()
                    .map(|t| t.parse().unwrap())
                    .collect();
                assert_eq!(v.len(), k + 2, "{what} line {i}: {line}");
                for c in 0..k {
                    worst = worst.max((v[c] - want[[i, c]]).abs());
                }
                let (li, st) = (v[k] as usize, v[k + 1] as usize);
                assert!(
                    near[i] || (g.compact().labels()[li] == labels[i] && st == stage[i] as usize),
                    "{what} row {i}: label {} stage {} vs score {} {}",
                    g.compact().labels()[li],
                    STAGES[st],
                    labels[i],
                    STAGES[stage[i] as usize]
                );
            }
            let scale = want.iter().fold(1.0f64, |a, v| a.max(v.abs()));
            assert!(worst <= 1e-3 * scale, "{what}: max |Δ| {worst:e}");
            eprintln!("{what}: max |Δ| {worst:.3e}, fallback share {sent:.3}");
        };
        // ONNX and the plain weights, in onnxruntime and numpy.
        let sc = score(&d, &m, &format!("g_{rule}"));
        let onnx = d.dir.join(format!("g_{rule}.onnx"));
        let o = ok(&["export", s(&m), "--format", "onnx", "--out", s(&onnx)]);
        assert!(o.contains("guarded model") && o.contains("guard:"), "{o}");
        let st = d.dir.join(format!("g_{rule}_w.safetensors"));
        ok(&["export", s(&m), "--format", "safetensors", "--out", s(&st)]);
        let r = py(
            "guarded_check.py",
            &[s(&onnx), s(&st), s(&d.test), "condition", s(&sc)],
        );
        eprint!("{rule}: {r}");
        // C, with the stage, built warning-free as C99. Its own check builds it with cc
        // -O2 and runs it on the rows (labels and speed beside score's).
        let out = d.dir.join(format!("c_g_{rule}"));
        let sum = d.dir.join(format!("c_g_{rule}.json"));
        let text = ok(&[
            "export",
            s(&m),
            "--format",
            "c",
            "--check-data",
            s(&d.test),
            "--target",
            "condition",
            "--summary",
            s(&sum),
            "--out",
            s(&out),
        ]);
        assert!(
            text.contains("in C built with") && text.contains("speed:"),
            "{text}"
        );
        let v: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&sum).unwrap()).unwrap();
        let c_agree = v["runtime_check"]["label_agreement"].as_f64().unwrap();
        let n_near = near.iter().filter(|&&b| b).count() as f64 / near.len() as f64;
        assert!(c_agree >= 1.0 - n_near, "{c_agree} ({n_near} near)");
        let exe = gcc_build(&out, "#include <stdio.h>\n#include \"kp_model.h\"\nint main(void) {\n    float x[64], out[64];\n    int d = kp_input_dim(), k = kp_output_dim();\n    static const char *const cols[] = KP_INPUT_NAMES;\n    if (cols[0] == NULL || kp_input_name(d - 1) == NULL || kp_model_info() == NULL) return 1;\n    for (;;) {\n        for (int j = 0; j < d; j++) if (scanf(\"%f\", &x[j]) != 1) return 0;\n        int st = kp_decision_stage(x, out);\n        int li = kp_label_index(x);\n        for (int c = 0; c < k; c++) printf(\"%.9g \", out[c]);\n        printf(\"%d %d\\n\", li, st);\n    }\n}\n", &format!("C {rule}"));
        check_printed(&run_with_stdin(&exe, &input), &format!("C {rule}"));
        // Rust, calling only some of the module's items, under -D warnings.
        let dir = d.dir.join(format!("rs_g_{rule}"));
        std::fs::create_dir_all(&dir).unwrap();
        ok(&[
            "export",
            s(&m),
            "--format",
            "rust",
            "--out",
            s(&dir.join("model.rs")),
        ]);
        let exe = rustc_build(&dir, "#[path = \"model.rs\"]\nmod model;\nuse std::io::Read;\nfn main() {\n    let mut s = String::new();\n    std::io::stdin().read_to_string(&mut s).unwrap();\n    let v: Vec<f32> = s.split_whitespace().map(|t| t.parse().unwrap()).collect();\n    let d = model::INPUT_NAMES.len();\n    let mut out = vec![0.0_f32; 64];\n    for row in v.chunks(d) {\n        let st = model::decision_stage(row, &mut out);\n        let li = model::label_index(row);\n        let cells: Vec<String> = out[..model::output_dim()].iter().map(|x| format!(\"{x:e}\")).collect();\n        println!(\"{} {li} {st}\", cells.join(\" \"));\n    }\n}\n", &format!("Rust {rule}"));
        check_printed(&run_with_stdin(&exe, &input), &format!("Rust {rule}"));
    }
    // The compiled stage alone: an ordinary compiled export, which says where it came from.
    let m = d.dir.join("g_row.safetensors");
    let onnx = d.dir.join("stage.onnx");
    let o = ok(&[
        "export",
        s(&m),
        "--stage",
        "compact",
        "--format",
        "onnx",
        "--out",
        s(&onnx),
    ]);
    assert!(o.contains("compiled stage"), "{o}");
    assert!(!o.contains("guard:"), "{o}");
    let e = bad(&[
        "export",
        s(&m),
        "--stage",
        "both",
        "--format",
        "onnx",
        "--out",
        s(&onnx),
    ]);
    assert!(e.contains("--stage"), "{e}");
}

/// int8 exports keep the f64 compiled model's labels on ≥ 0.98 of rows in onnxruntime with
/// its default optimisations, or the export warns (Nyström keeps its folded, cancelling
/// head in f32); the check's shipped figure and the export's own onnxruntime run match
/// onnxruntime's (tests/reference/onnx_int8.py), and `--min-agreement` gates the export
/// (exit 3; nothing written with `--discard-below-gate`).
#[test]
fn int8_exports_keep_labels_in_onnxruntime_and_the_gate_stops_them() {
    let d = data("int8_exports_keep_labels_in_onnxruntime_and_the_gate_stops_them");
    let calib = d.dir.join("calib.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 3000);
    let exact = root().join("models/pump_svm.safetensors");
    for method in ["nystrom", "fourier", "hadamard"] {
        let m = d.dir.join(format!("{method}.safetensors"));
        ok(&[
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
            "--no-timing",
            "--out",
            s(&m),
        ]);
        let sc = score(&d, &m, method);
        let onnx = d.dir.join(format!("{method}8.onnx"));
        let sum = d.dir.join(format!("{method}8.json"));
        let text = ok(&[
            "export",
            s(&m),
            "--format",
            "onnx",
            "--precision",
            "int8",
            "--check-data",
            s(&d.test),
            "--target",
            "condition",
            "--summary",
            s(&sum),
            "--out",
            s(&onnx),
        ]);
        if method == "nystrom" {
            assert!(text.contains("kept in f32"), "{text}");
        }
        // The export ran its file in onnxruntime (KP_PYTHON) and timed it beside score.
        assert!(
            text.contains("in onnxruntime") && text.contains("speed:"),
            "{text}"
        );
        let r = py(
            "onnx_int8.py",
            &[s(&onnx), s(&d.test), "condition", s(&sc), s(&sum), "0"],
        );
        eprint!("{method}: {r}");
        // ≥ 0.98 of the f64 labels in onnxruntime, or the export said so.
        let v: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&sum).unwrap()).unwrap();
        let in_ort = v["runtime_check"]["label_agreement"].as_f64().unwrap();
        assert!(
            in_ort >= 0.98 || text.contains("warning: labels change"),
            "{method}: {in_ort} without a warning:\n{text}"
        );
        if method == "hadamard" {
            // The gate: int8 changes some labels of this model (deterministic for its seed).
            let v: serde_json::Value =
                serde_json::from_str(&std::fs::read_to_string(&sum).unwrap()).unwrap();
            let a = v["check"]["shipped_label_agreement"].as_f64().unwrap();
            assert!(a < 1.0, "int8 changed no label: {a}");
            let gated = d.dir.join("gated.onnx");
            let o = run(&[
                "export",
                s(&m),
                "--format",
                "onnx",
                "--precision",
                "int8",
                "--check-data",
                s(&d.test),
                "--target",
                "condition",
                "--min-agreement",
                "1",
                "--out",
                s(&gated),
            ]);
            assert_eq!(o.status.code(), Some(3));
            assert!(
                gated.exists(),
                "without --discard-below-gate the file is written"
            );
            let gone = d.dir.join("gone.onnx");
            let o = run(&[
                "export",
                s(&m),
                "--format",
                "onnx",
                "--precision",
                "int8",
                "--check-data",
                s(&d.test),
                "--target",
                "condition",
                "--min-agreement",
                "1",
                "--discard-below-gate",
                "--out",
                s(&gone),
            ]);
            assert_eq!(o.status.code(), Some(3));
            assert!(!gone.exists());
        }
    }
}

//! Shared helpers for the integration tests: run the binary, temp folders, and the Python
//! reference scripts (numpy, scipy, safetensors) in the virtual environment that
//! `scripts/test.sh` creates.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

pub fn bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_kernelpress"))
}

pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// A fresh, empty folder under target/test-tmp named after the test.
pub fn tmpdir(name: &str) -> PathBuf {
    let d = root().join("target").join("test-tmp").join(name);
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

pub fn run(args: &[&str]) -> Output {
    // The machine profile of the cost model is cached here, not in the user's home.
    Command::new(bin())
        .env(
            "KERNELPRESS_CACHE_DIR",
            root().join("target").join("test-tmp").join("machine-cache"),
        )
        .args(args)
        .output()
        .expect("run kernelpress")
}

pub fn ok(args: &[&str]) -> String {
    let o = run(args);
    assert!(
        o.status.success(),
        "kernelpress {:?} failed ({:?}):\nstdout: {}\nstderr: {}",
        args,
        o.status.code(),
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    String::from_utf8(o.stdout).unwrap()
}

/// Runs and expects exit code 2 with a one-line error; returns stderr.
pub fn bad(args: &[&str]) -> String {
    let o = run(args);
    let err = String::from_utf8_lossy(&o.stderr).to_string();
    assert_eq!(
        o.status.code(),
        Some(2),
        "kernelpress {args:?} should exit 2; stderr: {err}"
    );
    assert!(!err.contains("panicked"), "panic: {err}");
    assert_eq!(
        err.trim().lines().count(),
        1,
        "one-line error expected: {err}"
    );
    err
}

/// The Python interpreter of the reference environment.
pub fn python() -> PathBuf {
    if let Ok(p) = std::env::var("KP_PYTHON") {
        return PathBuf::from(p);
    }
    let p = root().join("target/pyenv/bin/python");
    assert!(
        p.exists(),
        "the Python reference environment is missing: run `bash scripts/test.sh` (it creates target/pyenv)"
    );
    p
}

/// Runs `tests/reference/<script>` with `args`; panics with its output unless it exits 0.
/// Returns stdout.
pub fn py(script: &str, args: &[&str]) -> String {
    let path = root().join("tests/reference").join(script);
    let o = Command::new(python())
        .arg(&path)
        .args(args)
        .output()
        .expect("run python");
    let out = String::from_utf8_lossy(&o.stdout).to_string();
    assert!(
        o.status.success(),
        "reference check {script} {args:?} failed:\nstdout: {out}\nstderr: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    out
}

/// Copies the header and the first `n` data rows of `src` to `dst`.
pub fn head_lines(src: &Path, dst: &Path, n: usize) {
    let text = std::fs::read_to_string(src).unwrap();
    let t: String = text.lines().take(n + 1).map(|l| format!("{l}\n")).collect();
    std::fs::write(dst, t).unwrap();
}

pub fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Writes a CSV from rows of numbers plus an optional label column.
pub fn write_csv(
    path: &Path,
    names: &[&str],
    rows: &[Vec<f64>],
    labels: Option<(&str, &[String])>,
) {
    let mut t = names.join(",");
    if let Some((n, _)) = labels {
        t.push(',');
        t.push_str(n);
    }
    t.push('\n');
    for (i, r) in rows.iter().enumerate() {
        let cells: Vec<String> = r.iter().map(|v| format!("{v:?}")).collect();
        t.push_str(&cells.join(","));
        if let Some((_, l)) = labels {
            t.push(',');
            t.push_str(&l[i]);
        }
        t.push('\n');
    }
    std::fs::write(path, t).unwrap();
}

/// Runs a short Python program (`-c`) in the reference environment; returns stdout.
pub fn py_inline(code: &str, args: &[&str]) -> String {
    let o = Command::new(python())
        .arg("-c")
        .arg(code)
        .args(args)
        .output()
        .expect("run python");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    String::from_utf8_lossy(&o.stdout).to_string()
}

/// The demo's exact model.
pub fn demo_exact() -> kernelpress::model::ExactModel {
    kernelpress::model::ExactModel::load(&root().join("models/pump_svm.safetensors")).unwrap()
}

/// The feature rows of a demo data file (under `models/`), columns matched to the demo
/// model's by name.
pub fn demo_rows(file: &str) -> ndarray::Array2<f64> {
    let names = demo_exact().feature_names;
    kernelpress::data::read_for_model(
        &root().join("models").join(file),
        Some("condition"),
        &names,
        false,
    )
    .unwrap()
    .table
    .x
}

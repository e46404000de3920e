//! `export --check-data` in the artefact's own runtime: an ONNX export is run by
//! onnxruntime (through the Python of `KP_PYTHON`, else `python3`, when it can import
//! onnxruntime) on the check rows, its labels compared with the f64 model's and its
//! single-row and batched latency measured beside `score`'s own f32 paths. Without
//! onnxruntime the check says so and the library's shipped-arithmetic figure stands.

use kernelpress::model::OutputRule;
use kernelpress::{Error, Result};
use ndarray::{Array2, ArrayView2};
use std::path::{Path, PathBuf};
use std::process::Command;

/// The script onnxruntime runs: decisions of every row into an .npy file, then the
/// median single-row latency (up to 2,000 rows one at a time) and batched rows per second
/// (one thread each, as `score`'s single row), printed as JSON.
const SCRIPT: &str = r#"
import json, sys, time
import numpy as np
import onnxruntime as ort
model, rows, out = sys.argv[1:4]
x = np.load(rows).astype(np.float32)
o = ort.SessionOptions()
o.intra_op_num_threads = 1
o.inter_op_num_threads = 1
s = ort.InferenceSession(model, o, providers=["CPUExecutionProvider"])
name = s.get_inputs()[0].name
outs = [v.name for v in s.get_outputs()]
res = dict(zip(outs, s.run(None, {name: x})))
np.save(out, res["decision"].astype(np.float64))
ts = []
for i in range(min(len(x), 2000)):
    a = time.perf_counter()
    s.run(None, {name: x[i:i + 1]})
    ts.append(time.perf_counter() - a)
t, n = time.perf_counter(), 0
while time.perf_counter() - t < 1.0:
    s.run(None, {name: x})
    n += len(x)
print(json.dumps({"single_us": float(np.median(ts)) * 1e6,
                  "rows_per_s": n / (time.perf_counter() - t),
                  "version": ort.__version__}))
"#;

/// What onnxruntime gave.
#[derive(Debug, Clone, serde::Serialize)]
pub(crate) struct RuntimeCheck {
    /// `onnxruntime <version>`.
    pub runtime: String,
    /// Share of check rows whose label equals the f64 model's (classifiers).
    pub label_agreement: Option<f64>,
    /// Largest |decision − f64 decision|.
    pub max_abs_decision_change: f64,
    /// Median single-row latency, µs (one thread).
    pub single_us_p50: f64,
    /// Batched rows per second over the check rows (one thread).
    pub batch_rows_per_s: f64,
}

/// The Python that can import onnxruntime, if any.
fn python() -> Option<PathBuf> {
    let mut cands: Vec<PathBuf> = Vec::new();
    if let Ok(p) = std::env::var("KP_PYTHON") {
        cands.push(p.into());
    }
    cands.push("python3".into());
    cands.into_iter().find(|p| {
        Command::new(p)
            .args(["-c", "import onnxruntime, numpy"])
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false)
    })
}

/// Runs `onnx` in onnxruntime on `x` and compares with `reference` (the f64 model's
/// decisions) under `rule`. `Ok(None)` when no onnxruntime is available.
pub(crate) fn onnxruntime(
    onnx: &Path,
    x: ArrayView2<f64>,
    reference: ArrayView2<f64>,
    rule: &OutputRule,
) -> Result<Option<RuntimeCheck>> {
    let Some(py) = python() else {
        return Ok(None);
    };
    let dir = tempfile::Builder::new()
        .prefix(".kernelpress-check")
        .tempdir()
        .map_err(|e| Error::io(format!("a temporary folder for the onnxruntime check: {e}")))?;
    let rows = dir.path().join("rows.npy");
    let out = dir.path().join("decision.npy");
    let flat: Vec<f32> = x.iter().map(|v| *v as f32).collect();
    kernelpress::data::write_npy_f32(&rows, &[x.nrows(), x.ncols()], &flat)?;
    let o = Command::new(&py)
        .arg("-c")
        .arg(SCRIPT)
        .arg(onnx)
        .arg(&rows)
        .arg(&out)
        .output()
        .map_err(|e| Error::io(format!("running {}: {e}", py.display())))?;
    if !o.status.success() {
        let err = String::from_utf8_lossy(&o.stderr);
        let last = err.lines().last().unwrap_or("").to_string();
        return Err(Error::numerical(format!(
            "{}: onnxruntime could not run the export: {last}",
            onnx.display()
        )));
    }
    let v: serde_json::Value = serde_json::from_slice(&o.stdout)
        .map_err(|e| Error::numerical(format!("the onnxruntime check printed no result: {e}")))?;
    let d: Array2<f64> = kernelpress::data::read_npy(&out)?.into_2d("onnxruntime decisions")?;
    if d.dim() != reference.dim() {
        return Err(Error::numerical(format!(
            "onnxruntime gave decisions of shape {:?}, expected {:?}",
            d.dim(),
            reference.dim()
        )));
    }
    Ok(Some(compare(
        format!("onnxruntime {}", v["version"].as_str().unwrap_or("?")),
        d.view(),
        reference,
        rule,
        v["single_us"].as_f64().unwrap_or(f64::NAN),
        v["rows_per_s"].as_f64().unwrap_or(f64::NAN),
    )))
}

/// The runtime's decisions `d` against the f64 model's, with its speed.
fn compare(
    runtime: String,
    d: ArrayView2<f64>,
    reference: ArrayView2<f64>,
    rule: &OutputRule,
    single_us_p50: f64,
    batch_rows_per_s: f64,
) -> RuntimeCheck {
    let max = d
        .iter()
        .zip(reference.iter())
        .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
    let label_agreement = rule.task().is_classifier().then(|| {
        let a = rule.indices(reference);
        let b = rule.indices(d);
        a.iter().zip(&b).filter(|(p, q)| p == q).count() as f64 / a.len().max(1) as f64
    });
    RuntimeCheck {
        runtime,
        label_agreement,
        max_abs_decision_change: max,
        single_us_p50,
        batch_rows_per_s,
    }
}

/// The harness the C check builds with the export: reads `n × d` f32 rows from a file,
/// writes the decisions (f32) of every row to another, then times `kp_decision` over the
/// rows, repeated for at least 0.3 s, and prints the mean microseconds per row.
const C_MAIN: &str = r#"
#include <stdio.h>
#include <stdlib.h>
#include <time.h>
#include "kp_model.h"
int main(int argc, char **argv) {
    long n = atol(argv[1]);
    int d = PREFIX_input_dim(), k = PREFIX_output_dim();
    float *x = malloc(sizeof(float) * (size_t)(n * d)), *s = malloc(sizeof(float) * (size_t)(n * k));
    FILE *f = fopen(argv[2], "rb");
    if (!x || !s || !f || fread(x, sizeof(float), (size_t)(n * d), f) != (size_t)(n * d)) return 1;
    fclose(f);
    for (long i = 0; i < n; i++) PREFIX_decision(x + i * d, s + i * k);
    f = fopen(argv[3], "wb");
    if (!f || fwrite(s, sizeof(float), (size_t)(n * k), f) != (size_t)(n * k)) return 1;
    fclose(f);
    struct timespec a, b;
    long calls = 0;
    double el = 0;
    clock_gettime(CLOCK_MONOTONIC, &a);
    do {
        for (long i = 0; i < n && i < 2000; i++, calls++) PREFIX_decision(x + i * d, s);
        clock_gettime(CLOCK_MONOTONIC, &b);
        el = (double)(b.tv_sec - a.tv_sec) + 1e-9 * (double)(b.tv_nsec - a.tv_nsec);
    } while (el < 0.3);
    printf("%.6f\n", 1e6 * el / (double)calls);
    return 0;
}
"#;

/// The C compiler (`cc`, else `gcc`), if any.
fn c_compiler() -> Option<&'static str> {
    ["cc", "gcc"].into_iter().find(|c| {
        Command::new(c)
            .arg("--version")
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false)
    })
}

/// Builds the C export in `dir` (its `kp_model.h`, `kp_model.c`, symbols `prefix`) with the
/// system's `cc -O2` and a harness, runs it on `x` and compares with `reference` under
/// `rule`. `Ok(None)` when no C compiler is found.
pub(crate) fn c_export(
    dir: &Path,
    prefix: &str,
    x: ArrayView2<f64>,
    reference: ArrayView2<f64>,
    rule: &OutputRule,
) -> Result<Option<RuntimeCheck>> {
    let Some(cc) = c_compiler() else {
        return Ok(None);
    };
    let work = tempfile::Builder::new()
        .prefix("kernelpress-c-check")
        .tempdir()
        .map_err(|e| Error::io(format!("a temporary folder for the C check: {e}")))?;
    let w = work.path();
    let main = w.join("main.c");
    std::fs::write(&main, C_MAIN.replace("PREFIX", prefix))
        .map_err(|e| Error::io(format!("{}: {e}", main.display())))?;
    let exe = w.join("check");
    let o = Command::new(cc)
        .args(["-std=c99", "-D_POSIX_C_SOURCE=199309L", "-O2", "-I"])
        .arg(dir)
        .arg("-o")
        .arg(&exe)
        .arg(&main)
        .arg(dir.join("kp_model.c"))
        .arg("-lm")
        .output()
        .map_err(|e| Error::io(format!("running {cc}: {e}")))?;
    if !o.status.success() {
        let err = String::from_utf8_lossy(&o.stderr);
        return Err(Error::numerical(format!(
            "{cc} could not build the C export: {}",
            err.lines().next().unwrap_or("")
        )));
    }
    let rows = w.join("rows.f32");
    let out = w.join("decision.f32");
    let raw: Vec<u8> = x.iter().flat_map(|v| (*v as f32).to_le_bytes()).collect();
    std::fs::write(&rows, raw).map_err(|e| Error::io(format!("{}: {e}", rows.display())))?;
    let o = Command::new(&exe)
        .arg(x.nrows().to_string())
        .arg(&rows)
        .arg(&out)
        .output()
        .map_err(|e| Error::io(format!("running the C check: {e}")))?;
    if !o.status.success() {
        return Err(Error::numerical("the C export's check program failed"));
    }
    let us: f64 = String::from_utf8_lossy(&o.stdout)
        .trim()
        .parse()
        .unwrap_or(f64::NAN);
    let bytes = std::fs::read(&out).map_err(|e| Error::io(format!("{}: {e}", out.display())))?;
    let k = reference.ncols();
    if bytes.len() != 4 * x.nrows() * k {
        return Err(Error::numerical(
            "the C export's check wrote the wrong number of decisions",
        ));
    }
    let d = Array2::from_shape_fn((x.nrows(), k), |(i, j)| {
        let at = 4 * (i * k + j);
        f32::from_le_bytes([bytes[at], bytes[at + 1], bytes[at + 2], bytes[at + 3]]) as f64
    });
    Ok(Some(compare(
        format!("C built with {cc} -O2"),
        d.view(),
        reference,
        rule,
        us,
        1e6 / us,
    )))
}

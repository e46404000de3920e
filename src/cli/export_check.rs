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
    let max = d
        .iter()
        .zip(reference.iter())
        .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
    let label_agreement = rule.task().is_classifier().then(|| {
        let a = rule.indices(reference);
        let b = rule.indices(d.view());
        a.iter().zip(&b).filter(|(p, q)| p == q).count() as f64 / a.len().max(1) as f64
    });
    Ok(Some(RuntimeCheck {
        runtime: format!("onnxruntime {}", v["version"].as_str().unwrap_or("?")),
        label_agreement,
        max_abs_decision_change: max,
        single_us_p50: v["single_us"].as_f64().unwrap_or(f64::NAN),
        batch_rows_per_s: v["rows_per_s"].as_f64().unwrap_or(f64::NAN),
    }))
}

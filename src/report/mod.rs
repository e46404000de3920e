//! The error report of a compiled model against its exact teacher (SPEC §8): kernel error,
//! decision-value error, label agreement (with a Wilson 95% interval), accuracy, sizes,
//! analytic flops, and latency and throughput measured on this machine.

mod latency;

pub use latency::{measure_batch, measure_single, LatencyStats};

use crate::features::nystrom_from_landmarks;
use crate::model::{label_indices, CompiledModel, ExactModel};
use crate::program::{Program, Step};
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2};
use serde_json::{json, Value};

/// Wilson score interval for `k` successes in `n` trials at 95% (z = 1.959964).
/// (Wilson 1927; standard form, from memory.)
pub fn wilson95(k: usize, n: usize) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let z = 1.959963984540054;
    let n_f = n as f64;
    let p = k as f64 / n_f;
    let den = 1.0 + z * z / n_f;
    let centre = (p + z * z / (2.0 * n_f)) / den;
    let half = z * (p * (1.0 - p) / n_f + z * z / (4.0 * n_f * n_f)).sqrt() / den;
    ((centre - half).max(0.0), (centre + half).min(1.0))
}

/// Decision-value error: (rmse, r², max abs) pooled over all outputs.
pub fn decision_errors(exact: ArrayView2<f64>, approx: ArrayView2<f64>) -> (f64, f64, f64) {
    let n = exact.len() as f64;
    let mean = exact.sum() / n;
    let mut sse = 0.0;
    let mut sst = 0.0;
    let mut max: f64 = 0.0;
    for (a, b) in exact.iter().zip(approx.iter()) {
        sse += (a - b) * (a - b);
        sst += (a - mean) * (a - mean);
        max = max.max((a - b).abs());
    }
    let r2 = if sst > 0.0 { 1.0 - sse / sst } else { f64::NAN };
    ((sse / n).sqrt(), r2, max)
}

/// The feature program whose inner products approximate the kernel: the model's own
/// program, or for a Nyström model whose head was folded into the landmarks, the Nyström
/// map rebuilt from its landmarks (an analysis step of the report; loading never does it).
pub fn kernel_features(model: &CompiledModel) -> Result<Program> {
    if !model.is_folded() {
        return Ok(model.program().clone());
    }
    let ins = model.program().instrs();
    match ins.last().map(|i| &i.step) {
        Some(Step::KernelBlock(kb)) if ins.len() == 1 => {
            let mut info = crate::features::SampleInfo::default();
            nystrom_from_landmarks(
                kb.kernel(),
                kb.landmarks().clone(),
                model.spec().options.rank_tol,
                &mut info,
            )
        }
        _ => Err(Error::internal(
            "a folded head on a program that is not a landmark block",
        )),
    }
}

/// Kernel approximation error on `xs` (scaled inputs): (max abs, rmse, relative Frobenius)
/// of `Z Zᵀ` against the exact Gram matrix.
pub fn kernel_errors(model: &CompiledModel, xs: ArrayView2<f64>) -> Result<(f64, f64, f64)> {
    let k = &model.spec().kernel;
    let g = k.gram(xs, xs);
    let z = kernel_features(model)?.apply(xs);
    let approx = crate::linalg::abt_seq(z.view(), z.view());
    let mut max: f64 = 0.0;
    let mut sse = 0.0f64;
    let mut ss = 0.0f64;
    for (a, b) in g.iter().zip(approx.iter()) {
        max = max.max((a - b).abs());
        sse += (a - b) * (a - b);
        ss += a * a;
    }
    Ok((
        max,
        (sse / g.len() as f64).sqrt(),
        (sse / ss.max(1e-300)).sqrt(),
    ))
}

/// Options for [`build`].
#[derive(Debug, Clone)]
pub struct ReportOptions {
    /// Rows used for the kernel-error Gram block (the first ones).
    pub kernel_rows: usize,
    /// Minimum acceptable label agreement; below it the report warns.
    pub min_agreement: f64,
    /// Measure latency and throughput (off in tests that only check numbers).
    pub timing: bool,
    /// Single-row repetitions per model.
    pub reps: usize,
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            kernel_rows: 500,
            min_agreement: 0.99,
            timing: true,
            reps: 300,
        }
    }
}

/// Builds the report of `compiled` against `exact` on raw inputs `x` with optional true
/// labels. `exact_decision` may be passed when already computed.
pub fn build(
    compiled: &CompiledModel,
    exact: &ExactModel,
    x: ArrayView2<f64>,
    truth: Option<&[String]>,
    exact_decision: Option<Array2<f64>>,
    opts: &ReportOptions,
) -> Result<Value> {
    let n = x.nrows();
    let se = exact_decision.unwrap_or_else(|| exact.decision(x));
    let sc = compiled.decision(x);
    let (rmse, r2, maxe) = decision_errors(se.view(), sc.view());
    let xs_k = exact.scale_inputs(x.slice(s![..opts.kernel_rows.min(n), ..]));
    let (kmax, krmse, kfro) = kernel_errors(compiled, xs_k.view())?;
    let mut r = serde_json::Map::new();
    let spec = compiled.spec();
    r.insert("method".into(), json!(spec.method.name()));
    r.insert("features".into(), json!(compiled.features()));
    r.insert("seed".into(), json!(spec.seed));
    r.insert("kernel".into(), json!(spec.kernel.to_string()));
    r.insert("kernel_max_abs_error".into(), json!(kmax));
    r.insert("kernel_rmse".into(), json!(krmse));
    r.insert("gram_rel_frobenius_error".into(), json!(kfro));
    r.insert("kernel_rows".into(), json!(xs_k.nrows()));
    r.insert("decision_rmse".into(), json!(rmse));
    r.insert("decision_r2".into(), json!(r2));
    r.insert("decision_max_abs_error".into(), json!(maxe));
    let mut warnings: Vec<String> = Vec::new();
    if exact.task().is_classifier() {
        let k = exact.labels().len();
        let le = label_indices(exact.task(), k, se.view());
        let lc = label_indices(compiled.task(), k, sc.view());
        let agree = le.iter().zip(&lc).filter(|(a, b)| a == b).count();
        let (lo, hi) = wilson95(agree, n);
        let a = agree as f64 / n as f64;
        r.insert("agreement".into(), json!(a));
        r.insert("agreement_ci95".into(), json!([lo, hi]));
        r.insert("min_agreement".into(), json!(opts.min_agreement));
        let below = a < opts.min_agreement;
        r.insert("agreement_below_min".into(), json!(below));
        if below {
            warnings.push(format!(
                "label agreement with the exact model is {:.4} (95% CI {:.4}–{:.4}), below the tolerance {}: the compiled model changes {} of {} decisions",
                a, lo, hi, opts.min_agreement, n - agree, n
            ));
        }
        if let Some(t) = truth {
            let labels = exact.labels();
            let ae = le.iter().zip(t).filter(|(i, y)| labels[**i] == **y).count() as f64 / n as f64;
            let ac = lc.iter().zip(t).filter(|(i, y)| labels[**i] == **y).count() as f64 / n as f64;
            r.insert("accuracy_exact".into(), json!(ae));
            r.insert("accuracy_compiled".into(), json!(ac));
        } else {
            r.insert("accuracy_exact".into(), Value::Null);
            r.insert("accuracy_compiled".into(), Value::Null);
        }
    } else {
        r.insert("agreement".into(), Value::Null);
        r.insert("agreement_ci95".into(), Value::Null);
        r.insert("accuracy_exact".into(), Value::Null);
        r.insert("accuracy_compiled".into(), Value::Null);
    }
    r.insert("bytes_exact".into(), json!(exact.parameter_bytes()));
    r.insert("bytes_compiled".into(), json!(compiled.parameter_bytes()));
    let flops_exact = exact.flops();
    r.insert("flops_exact".into(), json!(flops_exact));
    r.insert("flops_compiled".into(), json!(compiled.flops()));
    if opts.timing {
        let e1 = measure_single(x, opts.reps.min(n.max(1) * 50), |row| {
            exact.decision_one(row)
        });
        let c1 = measure_single(x, opts.reps * 4, |row| compiled.decision_one(row));
        let eb = measure_batch(x, |b| exact.decision(b));
        let cb = measure_batch(x, |b| compiled.decision(b));
        r.insert("latency_us_exact_p50".into(), json!(e1.p50_us));
        r.insert("latency_us_exact_p99".into(), json!(e1.p99_us));
        r.insert("latency_us_compiled_p50".into(), json!(c1.p50_us));
        r.insert("latency_us_compiled_p99".into(), json!(c1.p99_us));
        r.insert("throughput_rows_per_s_exact".into(), json!(eb));
        r.insert("throughput_rows_per_s_compiled".into(), json!(cb));
        r.insert("speedup_single".into(), json!(e1.p50_us / c1.p50_us));
        r.insert("speedup_batch".into(), json!(cb / eb));
        r.insert("threads".into(), json!(rayon::current_num_threads()));
    } else {
        for k in [
            "latency_us_exact_p50",
            "latency_us_compiled_p50",
            "latency_us_compiled_p99",
            "throughput_rows_per_s_exact",
            "throughput_rows_per_s_compiled",
            "speedup_single",
            "speedup_batch",
        ] {
            r.insert(k.into(), Value::Null);
        }
    }
    r.insert("n_rows".into(), json!(n));
    r.insert("warnings".into(), json!(warnings));
    Ok(Value::Object(r))
}

fn f(v: &Value, k: &str) -> String {
    match v.get(k) {
        Some(Value::Number(n)) => {
            let x = n.as_f64().unwrap();
            if x.fract() == 0.0 && x.abs() < 1e15 {
                format!("{}", x as i64)
            } else if x.abs() >= 1e4 || x.abs() < 1e-3 {
                format!("{x:.3e}")
            } else {
                format!("{x:.4}")
            }
        }
        Some(Value::String(t)) => t.clone(),
        Some(Value::Null) | None => "—".into(),
        Some(o) => o.to_string(),
    }
}

/// The report as a human-readable table.
pub fn render_text(r: &Value) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "compiled model: {} with {} features (seed {}) for {}\nevaluated on {} rows\n\n",
        f(r, "method"),
        f(r, "features"),
        f(r, "seed"),
        r.get("kernel").and_then(|v| v.as_str()).unwrap_or("?"),
        f(r, "n_rows")
    ));
    let rows = [
        ("label agreement with exact", "agreement"),
        ("decision RMSE", "decision_rmse"),
        ("decision R²", "decision_r2"),
        ("decision max |error|", "decision_max_abs_error"),
        ("kernel max |error|", "kernel_max_abs_error"),
        ("kernel RMSE", "kernel_rmse"),
        ("Gram relative Frobenius error", "gram_rel_frobenius_error"),
    ];
    for (label, key) in rows {
        s.push_str(&format!("{label:<32} {}\n", f(r, key)));
    }
    if let Some(Value::Array(ci)) = r.get("agreement_ci95") {
        s.push_str(&format!(
            "{:<32} [{:.4}, {:.4}]\n",
            "agreement 95% interval (Wilson)",
            ci[0].as_f64().unwrap_or(0.0),
            ci[1].as_f64().unwrap_or(0.0)
        ));
    }
    s.push_str(&format!(
        "\n{:<32} {:>14} {:>14}\n",
        "", "exact", "compiled"
    ));
    for (label, a, b) in [
        ("accuracy", "accuracy_exact", "accuracy_compiled"),
        ("parameter bytes", "bytes_exact", "bytes_compiled"),
        ("flops per prediction", "flops_exact", "flops_compiled"),
        (
            "single-row latency p50 (µs)",
            "latency_us_exact_p50",
            "latency_us_compiled_p50",
        ),
        (
            "single-row latency p99 (µs)",
            "latency_us_exact_p99",
            "latency_us_compiled_p99",
        ),
        (
            "batched throughput (rows/s)",
            "throughput_rows_per_s_exact",
            "throughput_rows_per_s_compiled",
        ),
    ] {
        s.push_str(&format!("{label:<32} {:>14} {:>14}\n", f(r, a), f(r, b)));
    }
    s.push_str(&format!(
        "{:<32} {:>14} (single row), {} (batched)\n",
        "speedup",
        f(r, "speedup_single"),
        f(r, "speedup_batch")
    ));
    if let Some(Value::Array(w)) = r.get("warnings") {
        for x in w {
            s.push_str(&format!("\nWARNING: {}\n", x.as_str().unwrap_or("")));
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wilson_interval_reference() {
        // Wilson interval for 8/10 at 95%: (0.4902, 0.9433) (standard worked example, from
        // memory).
        let (lo, hi) = wilson95(8, 10);
        assert!(
            (lo - 0.4902).abs() < 1e-4 && (hi - 0.9433).abs() < 1e-4,
            "{lo} {hi}"
        );
        let (lo, hi) = wilson95(100, 100);
        assert!(hi == 1.0 && lo > 0.96);
    }
}

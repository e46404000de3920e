//! The report as text for people.

use super::Report;
use serde_json::Value;

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
pub fn render_text(report: &Report) -> String {
    let r = &serde_json::to_value(report).expect("a report serialises");
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

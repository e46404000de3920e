//! Choosing a method and a feature count: a sweep over candidates (every pair compiled,
//! measured and plotted), and a budget search that predicts before it compiles.
//!
//! Fidelity is a *loss* where lower is better: for classifiers the share of rows whose
//! label differs from the exact model's (disagreement), for regression the decision RMSE
//! relative to the spread of the exact model's decisions (`√(1 − R²)`).
//!
//! ```
//! use kernelpress::choose::pareto_front;
//! // (latency µs, loss): the second point is slower and worse than the first.
//! let front = pareto_front(&[(10.0, 0.05), (20.0, 0.06), (30.0, 0.01), (5.0, 0.2)]);
//! assert_eq!(front, vec![true, false, true, true]);
//! ```

mod page;
mod plot;
mod search;
mod sweep;

pub use page::render_page;
pub use plot::render_svg;
pub use search::{search, Budget, Choice, SearchOptions, SearchResult, PREDICTION_SLACK};
pub use sweep::{estimate_sweep_seconds, run_sweep, Sweep, SweepOptions};

use crate::cost::Prediction;
use crate::report::Report;
use serde_json::{json, Value};

/// One candidate (or the exact model) as measured.
#[derive(Debug, Clone)]
pub struct Record {
    /// Method name (`exact` for the exact model).
    pub method: String,
    /// Feature count (the exact model: its support vectors).
    pub features: usize,
    /// True for the exact model's reference record.
    pub exact: bool,
    /// Fidelity loss (see the module documentation).
    pub loss: f64,
    /// Label agreement (classifiers).
    pub agreement: Option<f64>,
    /// Measured single-row latency, median (µs).
    pub latency_us: f64,
    /// Measured batched throughput (rows/s).
    pub rows_per_s: f64,
    /// Parameter bytes.
    pub bytes: usize,
    /// Predicted speed.
    pub predicted: Prediction,
    /// Wall time of the compile (s; 0 for the exact model).
    pub compile_s: f64,
    /// On the Pareto front of latency against loss.
    pub pareto: bool,
    /// The full report (compiled candidates).
    pub report: Option<Report>,
}

impl Record {
    /// `predicted / measured − 1` of the single-row latency.
    pub fn latency_prediction_error(&self) -> f64 {
        self.predicted.latency_us / self.latency_us - 1.0
    }

    /// The record as JSON: every report key, plus the sweep's own keys.
    pub fn to_json(&self) -> Value {
        let mut v = match &self.report {
            Some(r) => r.to_json(),
            None => json!({"method": self.method, "features": self.features}),
        };
        let extra = json!({
            "method": self.method,
            "exact_model": self.exact,
            "loss": self.loss,
            "latency_us_p50": self.latency_us,
            "throughput_rows_per_s": self.rows_per_s,
            "bytes": self.bytes,
            "predicted_latency_us": self.predicted.latency_us,
            "predicted_throughput_rows_per_s": self.predicted.rows_per_s,
            "latency_prediction_error": self.latency_prediction_error(),
            "compile_seconds": self.compile_s,
            "pareto": self.pareto,
            "latency_basis": if self.method.ends_with("+guard") { "mean" } else { "median" },
        });
        if let (Some(o), Some(e)) = (v.as_object_mut(), extra.as_object()) {
            for (k, x) in e {
                o.insert(k.clone(), x.clone());
            }
            if self.exact {
                o.insert("agreement".into(), json!(self.agreement));
            }
        }
        v
    }
}

/// The loss of a report: disagreement for classifiers, `√(1 − R²)` for regression.
pub fn loss_of(r: &Report) -> f64 {
    match (r.agreement, r.decision_r2) {
        (Some(a), _) => 1.0 - a,
        (None, Some(r2)) => (1.0 - r2).max(0.0).sqrt(),
        (None, None) => {
            if r.decision_rmse == 0.0 {
                0.0
            } else {
                1.0
            }
        }
    }
}

/// For each `(latency, loss)` point: true when no other point is at least as good in both
/// and strictly better in one.
pub fn pareto_front(points: &[(f64, f64)]) -> Vec<bool> {
    points
        .iter()
        .map(|&(t, l)| {
            !points
                .iter()
                .any(|&(t2, l2)| t2 <= t && l2 <= l && (t2 < t || l2 < l))
        })
        .collect()
}

/// Marks the Pareto front of `records` (exact model included).
pub fn mark_front(records: &mut [Record]) {
    let pts: Vec<(f64, f64)> = records.iter().map(|r| (r.latency_us, r.loss)).collect();
    for (r, f) in records.iter_mut().zip(pareto_front(&pts)) {
        r.pareto = f;
    }
}

/// What to recommend from measured records: the fastest whose loss is at most `max_loss`
/// (the exact model when it is the fastest such), else the most faithful compiled one
/// (with `false`: it does not meet the bound).
pub fn recommend(records: &[Record], max_loss: f64) -> Option<(usize, bool)> {
    let ok = records
        .iter()
        .enumerate()
        .filter(|(_, r)| r.loss <= max_loss)
        .min_by(|a, b| a.1.latency_us.total_cmp(&b.1.latency_us))
        .map(|(i, _)| (i, true));
    ok.or_else(|| {
        records
            .iter()
            .enumerate()
            .filter(|(_, r)| !r.exact)
            .min_by(|a, b| {
                a.1.loss
                    .total_cmp(&b.1.loss)
                    .then(a.1.latency_us.total_cmp(&b.1.latency_us))
            })
            .map(|(i, _)| (i, false))
    })
}

/// Spearman's rank correlation of two equally long samples (ties get mean ranks).
pub fn spearman(a: &[f64], b: &[f64]) -> f64 {
    fn ranks(v: &[f64]) -> Vec<f64> {
        let mut idx: Vec<usize> = (0..v.len()).collect();
        idx.sort_by(|&i, &j| v[i].total_cmp(&v[j]));
        let mut r = vec![0.0; v.len()];
        let mut i = 0;
        while i < idx.len() {
            let mut j = i;
            while j + 1 < idx.len() && v[idx[j + 1]] == v[idx[i]] {
                j += 1;
            }
            let mean = (i + j) as f64 / 2.0 + 1.0;
            for &k in &idx[i..=j] {
                r[k] = mean;
            }
            i = j + 1;
        }
        r
    }
    let (ra, rb) = (ranks(a), ranks(b));
    let n = a.len() as f64;
    let (ma, mb) = (ra.iter().sum::<f64>() / n, rb.iter().sum::<f64>() / n);
    let cov: f64 = ra.iter().zip(&rb).map(|(x, y)| (x - ma) * (y - mb)).sum();
    let va: f64 = ra.iter().map(|x| (x - ma).powi(2)).sum();
    let vb: f64 = rb.iter().map(|y| (y - mb).powi(2)).sum();
    cov / (va * vb).sqrt()
}

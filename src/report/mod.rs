//! The error report of a compiled model against its exact teacher: kernel error,
//! decision-value error, label agreement (with a Wilson 95% interval), accuracy, sizes,
//! analytic flops, and latency and throughput measured on this machine.
//!
//! Split by concern: [`metrics`] computes the numbers, `latency.rs` measures time, `render.rs`
//! writes text for people; [`Report`] is the typed result, whose JSON (from serde) has the
//! keys documented in the README.

mod latency;
pub mod metrics;
mod render;

pub use latency::{measure_batch, measure_single, LatencyStats};
pub use metrics::{decision_errors, gram_errors, kernel_errors, kernel_features, wilson95};
pub use render::{bytes as format_bytes, count as format_count, render_text, speed_ratio};

use crate::model::{label_indices, CompiledModel, ExactModel, GuardedModel};
use crate::Result;
use ndarray::{s, Array2, ArrayView2};
use serde::{Deserialize, Serialize};

/// Measured timings (all `None` when timing is off; never stored in model files, so that
/// files stay bit-identical from run to run).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Timing {
    /// Exact model, single row, median (µs).
    pub latency_us_exact_p50: Option<f64>,
    /// Exact model, single row, 99th percentile (µs).
    pub latency_us_exact_p99: Option<f64>,
    /// Compiled model, single row, median (µs).
    pub latency_us_compiled_p50: Option<f64>,
    /// Compiled model, single row, 99th percentile (µs).
    pub latency_us_compiled_p99: Option<f64>,
    /// Exact model, batched (rows/s).
    pub throughput_rows_per_s_exact: Option<f64>,
    /// Compiled model, batched (rows/s).
    pub throughput_rows_per_s_compiled: Option<f64>,
    /// Single-row p50 ratio exact / compiled.
    pub speedup_single: Option<f64>,
    /// Batched throughput ratio compiled / exact.
    pub speedup_batch: Option<f64>,
    /// Threads used by the batched measurements.
    pub threads: Option<usize>,
    /// Compiled model with its head in f32, single row, median (µs).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_compiled_f32_p50: Option<f64>,
    /// Exact model with its support vectors in f32, single row, median (µs).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_exact_f32_p50: Option<f64>,
    /// Both in f32: exact f32 single-row median ÷ compiled f32-head single-row median.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speedup_single_f32: Option<f64>,
    /// Exact model, batched in f32 ([`ExactModel::decision_f32`]) (rows/s).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub throughput_rows_per_s_exact_f32: Option<f64>,
    /// Compiled model, batched in f32 ([`CompiledModel::decision_f32`]) (rows/s).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub throughput_rows_per_s_compiled_f32: Option<f64>,
    /// Both batched in f32: compiled f32 throughput ÷ exact f32 throughput.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speedup_batch_f32: Option<f64>,
    /// Guarded models: mean single-row latency of the exact model (µs).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_exact_mean: Option<f64>,
    /// Guarded models: mean single-row latency of the whole guarded model (µs).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_compiled_mean: Option<f64>,
    /// Guarded models: mean single-row latency ratio exact / guarded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speedup_mean: Option<f64>,
    /// Guarded models: the mean single-row latencies and their ratio with both sides in
    /// f32 (the exact model's f32 row; the guarded model's f32 stages, its pairs
    /// completed in f64).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_exact_f32_mean: Option<f64>,
    /// See [`Self::latency_us_exact_f32_mean`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latency_us_compiled_f32_mean: Option<f64>,
    /// See [`Self::latency_us_exact_f32_mean`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speedup_mean_f32: Option<f64>,
}

/// Rows whose label changes from `exact` to `compiled`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Change {
    /// The exact model's label.
    pub exact: String,
    /// The compiled model's label.
    pub compiled: String,
    /// Rows.
    pub rows: usize,
}

/// The report (JSON keys as named here).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    /// Feature-map method.
    pub method: String,
    /// Features the head was fitted on.
    pub features: usize,
    /// Seed of the map.
    pub seed: u64,
    /// The random map's bandwidth as a multiple of the kernel's (1 unless distillation's
    /// bandwidth search chose another).
    #[serde(default = "one")]
    pub map_bandwidth: f64,
    /// Kernel expression.
    pub kernel: String,
    /// Largest `|k(x, y) − z(x)·z(y)|` over the kernel rows.
    pub kernel_max_abs_error: f64,
    /// Root mean square kernel error.
    pub kernel_rmse: f64,
    /// `‖K − Z Zᵀ‖_F / ‖K‖_F`.
    pub gram_rel_frobenius_error: f64,
    /// Rows used for the kernel errors.
    pub kernel_rows: usize,
    /// Root mean square decision-value error, pooled over outputs.
    pub decision_rmse: f64,
    /// R² of the compiled decision values against the exact ones (none when constant).
    pub decision_r2: Option<f64>,
    /// Largest decision-value error.
    pub decision_max_abs_error: f64,
    /// Label agreement with the exact model (classifiers).
    pub agreement: Option<f64>,
    /// Wilson 95% interval of the agreement.
    pub agreement_ci95: Option<[f64; 2]>,
    /// The tolerance the agreement was compared with (classifiers).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub min_agreement: Option<f64>,
    /// True when the agreement is below the tolerance.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_below_min: Option<bool>,
    /// Accuracy of the exact model (when true labels are given).
    pub accuracy_exact: Option<f64>,
    /// Accuracy of the compiled model.
    pub accuracy_compiled: Option<f64>,
    /// Parameter bytes of the exact model.
    pub bytes_exact: usize,
    /// Parameter bytes of the compiled model.
    pub bytes_compiled: usize,
    /// Flops per prediction, exact (analytic).
    pub flops_exact: usize,
    /// Flops per prediction, compiled (analytic).
    pub flops_compiled: usize,
    /// Measured timings.
    #[serde(flatten)]
    pub timing: Timing,
    /// Rows evaluated.
    pub n_rows: usize,
    /// The non-zero off-diagonal cells of the exact × compiled label table, largest first.
    #[serde(default)]
    pub changed_decisions: Vec<Change>,
    /// How much the head cancels: `max Σ_j |z_j·w_jc|` over the kernel rows and outputs,
    /// divided by the largest |decision value| (at least 1). Rounding to f32 (exports)
    /// moves decisions by about this × 2⁻²⁴ of their scale.
    #[serde(default)]
    pub head_cancellation: f64,
    /// Label agreement with the exact model (f64) of the compiled model scored with its
    /// head in f32 (classifiers).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_f32: Option<f64>,
    /// Largest decision-value difference between the f32-head and the f64 compiled paths.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub f32_max_abs_difference: Option<f64>,
    /// The precision of the head's products on the f32 paths, when it is not f32
    /// (`bf16`, `int8`: `compile --head-precision`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub head_precision: Option<String>,
    /// Label agreement of the f32 path (at the head's precision) with the compiled
    /// model's own f64 path (classifiers): what the precision alone changes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_f32_with_f64: Option<f64>,
    /// Label agreement of the exact model's single-row f32 path with its f64 path
    /// (classifiers; measured with the timings).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_exact_f32: Option<f64>,
    /// Label agreement with the exact model (f64) of the compiled model's f32 batches
    /// (classifiers; measured with the timings).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_f32_batch: Option<f64>,
    /// Label agreement of the exact model's f32 batches with its f64 path (classifiers;
    /// measured with the timings).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub agreement_exact_f32_batch: Option<f64>,
    /// Guarded models: share of rows answered by each stage (compiled, exact, partial:
    /// the compiled model with some decision values recomputed exactly).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stage_shares: Option<Vec<f64>>,
    /// Guarded models: mean share of the exact model's support vectors read per row.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub exact_work_share: Option<f64>,
    /// Guarded models: agreement with the exact model of the rows each stage answered
    /// (none for a stage that answered no row).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stage_agreement: Option<Vec<Option<f64>>>,
    /// Class probabilities (a model with a probability calibration, on rows with true
    /// labels): how well they are calibrated on the evaluation rows.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub probabilities: Option<ProbabilityQuality>,
    /// Refinement (`compile --refine`): passes run and kept, the ridge-choice error and
    /// the audit-row agreement before and after, what moved, seconds.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub refine: Option<serde_json::Value>,
    /// Warnings for the user.
    pub warnings: Vec<String>,
    /// Which rows the figures were computed on.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub evaluated_on: Option<String>,
}

/// How good class probabilities are on labelled rows: the mean negative log-likelihood of
/// the true class (log loss, natural log; lower is better; ln k for a uniform guess over k
/// classes) and the Brier score (the mean squared distance between the probability vector
/// and the true class's indicator, Brier 1950; 0 is perfect).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ProbabilityQuality {
    /// Mean −ln p(true class), with p clamped at 1e-15.
    pub log_loss: f64,
    /// Mean Σ_c (p_c − [c = true class])².
    pub brier: f64,
    /// Rows judged (rows whose true label is one of the model's).
    pub n_rows: usize,
    /// What the sigmoids were fitted on.
    pub fitted_on: String,
}

/// Log loss and Brier score of class probabilities `p` (rows × classes, label order)
/// against true labels `truth`; rows with a label the model does not know are skipped.
/// `None` when no row is left.
pub fn probability_quality(
    p: ndarray::ArrayView2<f64>,
    labels: &[String],
    truth: &[String],
    fitted_on: &str,
) -> Option<ProbabilityQuality> {
    let (mut ll, mut br, mut n) = (0.0, 0.0, 0usize);
    for (row, t) in p.rows().into_iter().zip(truth) {
        let Some(c) = labels.iter().position(|l| l == t) else {
            continue;
        };
        ll -= row[c].max(1e-15).ln();
        br += row
            .iter()
            .enumerate()
            .map(|(j, v)| (v - f64::from(u8::from(j == c))).powi(2))
            .sum::<f64>();
        n += 1;
    }
    (n > 0).then(|| ProbabilityQuality {
        log_loss: ll / n as f64,
        brier: br / n as f64,
        n_rows: n,
        fitted_on: fitted_on.to_string(),
    })
}

impl Report {
    /// The report as JSON.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::to_value(self).expect("a report serialises")
    }

    /// The deterministic part (timings cleared), as stored in model files.
    pub fn without_timing(&self) -> Report {
        Report {
            timing: Timing::default(),
            ..self.clone()
        }
    }
}

/// The report of a guarded model on raw inputs `x`: the kernel figures describe its
/// compiled stage; decisions, agreement, accuracy, bytes and timings describe the whole
/// guarded model; `stage_shares` and `stage_agreement` say which stage answered which rows
/// and how well; mean latencies and `speedup_mean` are measured over the rows' mix of
/// stages.
pub fn build_guarded(
    g: &GuardedModel,
    exact: &ExactModel,
    x: ArrayView2<f64>,
    truth: Option<&[String]>,
    opts: &ReportOptions,
) -> Result<Report> {
    let n = x.nrows();
    let se = exact.decision(x);
    let quiet = ReportOptions {
        timing: false,
        ..opts.clone()
    };
    let mut r = build(g.compact(), exact, x, truth, Some(se.clone()), &quiet)?;
    let (sg, stage) = g.decision(x);
    // The f32-head figures describe a compiled model alone, not the guard.
    r.agreement_f32 = None;
    r.agreement_f32_with_f64 = None;
    r.head_precision = None;
    r.f32_max_abs_difference = None;
    let (rmse, r2, maxe) = decision_errors(se.view(), sg.view());
    r.decision_rmse = rmse;
    r.decision_r2 = r2.is_finite().then_some(r2);
    r.decision_max_abs_error = maxe;
    r.warnings
        .retain(|w| !w.starts_with("label agreement with the exact model"));
    label_figures(&mut r, exact, se.view(), sg.view(), truth, opts);
    let k = exact.labels().len();
    let le = label_indices(exact.task(), k, se.view());
    let lg = label_indices(exact.task(), k, sg.view());
    let mut shares = Vec::new();
    let mut agree = Vec::new();
    for st in 0..crate::model::guarded::STAGES.len() as u8 {
        let rows: Vec<usize> = (0..n).filter(|&i| stage[i] == st).collect();
        shares.push(rows.len() as f64 / n.max(1) as f64);
        agree.push(
            (!rows.is_empty()).then(|| {
                rows.iter().filter(|&&i| le[i] == lg[i]).count() as f64 / rows.len() as f64
            }),
        );
    }
    r.stage_shares = Some(shares);
    r.stage_agreement = Some(agree);
    r.exact_work_share = Some(g.exact_work_share(x));
    r.bytes_compiled = g.compact().parameter_bytes() + exact.parameter_bytes();
    if opts.timing {
        let et = opts
            .exact_timing
            .unwrap_or_else(|| measure_exact(exact, x, opts));
        let e_mean = measure_single(x, opts.reps.min(n.max(1) * 50), |row| {
            exact.decision_one(row)
        });
        let c1 = measure_single(x, opts.reps * 4, |row| g.decision_one(row).0);
        let cb = measure_batch(x, |b| g.decision(b).0);
        let e32 = measure_single(x, opts.reps.min(n.max(1) * 50), |row| {
            exact.decision_one_f32(row)
        });
        let c32 = measure_single(x, opts.reps * 4, |row| g.decision_one_f32(row).0);
        r.timing = Timing {
            latency_us_exact_p50: Some(et.single.p50_us),
            latency_us_exact_p99: Some(et.single.p99_us),
            latency_us_compiled_p50: Some(c1.p50_us),
            latency_us_compiled_p99: Some(c1.p99_us),
            throughput_rows_per_s_exact: Some(et.rows_per_s),
            throughput_rows_per_s_compiled: Some(cb),
            speedup_single: Some(et.single.p50_us / c1.p50_us),
            speedup_batch: Some(cb / et.rows_per_s),
            threads: Some(rayon::current_num_threads()),
            latency_us_compiled_f32_p50: None,
            latency_us_exact_f32_p50: None,
            speedup_single_f32: None,
            latency_us_exact_mean: Some(e_mean.mean_us),
            latency_us_compiled_mean: Some(c1.mean_us),
            speedup_mean: Some(e_mean.mean_us / c1.mean_us),
            latency_us_exact_f32_mean: Some(e32.mean_us),
            latency_us_compiled_f32_mean: Some(c32.mean_us),
            speedup_mean_f32: Some(e32.mean_us / c32.mean_us),
            ..Timing::default()
        };
        let sp = e_mean.mean_us / c1.mean_us;
        if sp < 1.0 {
            r.warnings.push(format!(
                "speed: the guarded model is slower on average than the exact model ({sp:.2}× its mean speed): the exact model takes part in too many rows; use a more faithful compiled model or a lower target, or keep the exact model"
            ));
        }
    }
    Ok(r)
}

fn one() -> f64 {
    1.0
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
    /// The exact model's timings on these rows, when already measured ([`measure_exact`]).
    pub exact_timing: Option<ExactTiming>,
}

/// The exact model's measured speed on a set of rows, shared by several reports.
#[derive(Debug, Clone, Copy)]
pub struct ExactTiming {
    /// Single-row latency.
    pub single: LatencyStats,
    /// Single-row latency of the f32 path ([`ExactModel::decision_one_f32`]).
    pub single_f32: LatencyStats,
    /// Batched throughput (rows/s).
    pub rows_per_s: f64,
    /// Batched throughput of the f32 path ([`ExactModel::decision_f32`], rows/s).
    pub rows_per_s_f32: f64,
}

/// Measures the exact model as [`build`] does.
pub fn measure_exact(exact: &ExactModel, x: ArrayView2<f64>, opts: &ReportOptions) -> ExactTiming {
    let n = x.nrows();
    ExactTiming {
        single: measure_single(x, opts.reps.min(n.max(1) * 50), |row| {
            exact.decision_one(row)
        }),
        single_f32: measure_single(x, opts.reps.min(n.max(1) * 50), |row| {
            exact.decision_one_f32(row)
        }),
        rows_per_s: measure_batch(x, |b| exact.decision(b)),
        rows_per_s_f32: measure_batch(x, |b| exact.decision_f32(b)),
    }
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            kernel_rows: 500,
            min_agreement: 0.99,
            timing: true,
            reps: 300,
            exact_timing: None,
        }
    }
}

/// Agreement, its interval, the changed decisions and the accuracies of `sc` against the
/// exact decisions `se` (classifiers), with the warning below the tolerance.
fn label_figures(
    r: &mut Report,
    exact: &ExactModel,
    se: ArrayView2<f64>,
    sc: ArrayView2<f64>,
    truth: Option<&[String]>,
    opts: &ReportOptions,
) {
    let n = se.nrows();
    if exact.task().is_classifier() {
        let k = exact.labels().len();
        let le = label_indices(exact.task(), k, se);
        let lc = label_indices(exact.task(), k, sc);
        let agree = le.iter().zip(&lc).filter(|(a, b)| a == b).count();
        let mut cells = std::collections::BTreeMap::new();
        for (a, b) in le.iter().zip(&lc).filter(|(a, b)| a != b) {
            *cells.entry((*a, *b)).or_insert(0usize) += 1;
        }
        let names = exact.labels();
        let mut changes: Vec<Change> = cells
            .into_iter()
            .map(|((a, b), rows)| Change {
                exact: names[a].clone(),
                compiled: names[b].clone(),
                rows,
            })
            .collect();
        changes.sort_by_key(|c| std::cmp::Reverse(c.rows));
        r.changed_decisions = changes;
        let (lo, hi) = wilson95(agree, n);
        let a = agree as f64 / n as f64;
        r.agreement = Some(a);
        r.agreement_ci95 = Some([lo, hi]);
        r.min_agreement = Some(opts.min_agreement);
        let below = a < opts.min_agreement;
        r.agreement_below_min = Some(below);
        if below {
            r.warnings.push(format!(
                "label agreement with the exact model is {:.4} (95% CI {:.4}–{:.4}), below the tolerance {}: the compiled model changes {} of {} decisions",
                a, lo, hi, opts.min_agreement, n - agree, n
            ));
        }
        if let Some(t) = truth {
            let labels = exact.labels();
            let acc = |l: &[usize]| {
                l.iter().zip(t).filter(|(i, y)| labels[**i] == **y).count() as f64 / n as f64
            };
            r.accuracy_exact = Some(acc(&le));
            r.accuracy_compiled = Some(acc(&lc));
        }
    }
}

/// Builds the report of `compiled` against `exact` on raw inputs `x` with optional true
/// labels. `exact_decision` may be passed when already computed.
///
/// ```
/// use kernelpress::features::{FeatureSpec, Method};
/// use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
/// use kernelpress::model::{ExactModel, Task};
/// use kernelpress::report::{build, ReportOptions};
/// use ndarray::Array2;
/// let sv = Array2::from_shape_fn((20, 2), |(i, j)| ((i * 2 + j) as f64 * 0.7).sin());
/// let coef = Array2::from_shape_fn((20, 1), |(i, _)| if i % 2 == 0 { 1.0 } else { -1.0 });
/// let exact = ExactModel::new("gaussian(gamma=1)".parse().unwrap(), sv, coef, vec![0.0],
///     Task::Binary, vec!["a".into(), "b".into()], None).unwrap();
/// let x = Array2::from_shape_fn((200, 2), |(i, j)| ((i * 2 + j) as f64 * 0.31).cos());
/// let spec = FeatureSpec::new(exact.kernel().clone(), Method::Orthogonal, 2, 256, 1);
/// let (m, _) = compile_exact(&exact, Some(x.view()), &spec, HeadKind::Distill,
///     &RidgeGrid::standard(), None, &kernelpress::observe::Silent).unwrap();
/// let opts = ReportOptions { timing: false, ..Default::default() };
/// let r = build(&m, &exact, x.view(), None, None, &opts).unwrap();
/// assert!(r.agreement.unwrap() > 0.9);
/// assert!(r.to_json()["latency_us_compiled_p50"].is_null());
/// ```
pub fn build(
    compiled: &CompiledModel,
    exact: &ExactModel,
    x: ArrayView2<f64>,
    truth: Option<&[String]>,
    exact_decision: Option<Array2<f64>>,
    opts: &ReportOptions,
) -> Result<Report> {
    let n = x.nrows();
    let se = exact_decision.unwrap_or_else(|| exact.decision(x));
    let sc = compiled.decision(x);
    for (what, s) in [("exact", &se), ("compiled", &sc)] {
        if let Some(i) = s.iter().position(|v| !v.is_finite()) {
            return Err(crate::Error::numerical(format!(
                "the {what} model's decision value on row {} is {} (overflow): its kernel or weights are too extreme for these inputs",
                i / s.ncols().max(1) + 1,
                s.as_slice().map(|v| v[i]).unwrap_or(f64::NAN)
            )));
        }
    }
    let (rmse, r2, maxe) = decision_errors(se.view(), sc.view());
    let xs_k = exact.scale_inputs(x.slice(s![..opts.kernel_rows.min(n), ..]));
    // The program's features serve both the kernel errors and the cancellation measure;
    // only a folded head needs the kernel features rebuilt.
    let z = compiled.program().apply(xs_k.view());
    let (kmax, krmse, kfro) = if compiled.is_folded() {
        kernel_errors(compiled, xs_k.view())?
    } else {
        gram_errors(&compiled.spec().kernel, xs_k.view(), z.view())
    };
    let mass = z
        .mapv(f64::abs)
        .dot(&compiled.head().mapv(f64::abs))
        .iter()
        .fold(0.0f64, |m, v| m.max(*v));
    let top = sc.iter().fold(1.0f64, |m, v| m.max(v.abs()));
    let cancellation = mass / top;
    let spec = compiled.spec();
    let mut r = Report {
        method: spec.method.name().to_string(),
        features: compiled.features(),
        seed: spec.seed,
        map_bandwidth: spec.options.map_bandwidth,
        kernel: spec.kernel.to_string(),
        kernel_max_abs_error: kmax,
        kernel_rmse: krmse,
        gram_rel_frobenius_error: kfro,
        kernel_rows: xs_k.nrows(),
        decision_rmse: rmse,
        decision_r2: r2.is_finite().then_some(r2),
        decision_max_abs_error: maxe,
        agreement: None,
        agreement_ci95: None,
        min_agreement: None,
        agreement_below_min: None,
        accuracy_exact: None,
        accuracy_compiled: None,
        bytes_exact: exact.parameter_bytes(),
        bytes_compiled: compiled.parameter_bytes(),
        flops_exact: exact.flops(),
        flops_compiled: compiled.flops(),
        timing: Timing::default(),
        n_rows: n,
        changed_decisions: Vec::new(),
        head_cancellation: cancellation,
        agreement_f32: None,
        agreement_exact_f32: None,
        agreement_f32_batch: None,
        agreement_exact_f32_batch: None,
        f32_max_abs_difference: None,
        head_precision: (compiled.head_precision() != crate::linalg::HeadPrecision::F32)
            .then(|| compiled.head_precision().name().to_string()),
        agreement_f32_with_f64: None,
        stage_shares: None,
        exact_work_share: None,
        stage_agreement: None,
        probabilities: None,
        refine: compiled.fit.get("refine").cloned(),
        warnings: Vec::new(),
        evaluated_on: None,
    };
    if let (Some((p, on)), Some(t)) = (&compiled.probabilities, truth) {
        let probs = p.class_probabilities(compiled.rule(), sc.view());
        r.probabilities = probability_quality(probs.view(), compiled.labels(), t, on);
    }
    label_figures(&mut r, exact, se.view(), sc.view(), truth, opts);
    // The f32 path, row by row, against the exact model and the f64 path.
    let mut s32 = Array2::<f64>::zeros(sc.dim());
    for (i, row) in x.rows().into_iter().enumerate() {
        let v = match row.as_slice() {
            Some(sl) => compiled.decision_one_f32(sl),
            None => compiled.decision_one_f32(&row.to_vec()),
        };
        s32.row_mut(i).assign(&ndarray::ArrayView1::from(&v));
    }
    let moved = (&s32 - &sc).iter().fold(0.0f64, |m, v| m.max(v.abs()));
    r.f32_max_abs_difference = Some(moved);
    // About one f32 rounding (2⁻²⁴) of the sum's absolute mass decides whether to warn (on
    // the demo's Nyström model, cancellation 3,469, that predicts 2.1e-4 of the decision
    // scale); the warning then quotes the one figure measured on these rows, the same as
    // the report's "with the head in f32" line, so that the user meets one number.
    if cancellation * 2f64.powi(-24) > 1e-4 {
        r.warnings.push(format!(
            "precision: the head cancels large terms (their magnitudes sum to {cancellation:.0}× the largest decision value): with the head in f32 the decisions moved by up to {moved:.1e} ({:.1e} of their scale) on these rows; an export's own arithmetic can differ, so check it with `export --check-data`",
            moved / top
        ));
    }
    if exact.task().is_classifier() {
        let k = exact.labels().len();
        let le = label_indices(exact.task(), k, se.view());
        let l32 = label_indices(exact.task(), k, s32.view());
        r.agreement_f32 =
            Some(le.iter().zip(&l32).filter(|(a, b)| a == b).count() as f64 / n.max(1) as f64);
        let lc = label_indices(exact.task(), k, sc.view());
        r.agreement_f32_with_f64 =
            Some(lc.iter().zip(&l32).filter(|(a, b)| a == b).count() as f64 / n.max(1) as f64);
    }
    if opts.timing {
        let et = opts
            .exact_timing
            .unwrap_or_else(|| measure_exact(exact, x, opts));
        let (e1, eb) = (et.single, et.rows_per_s);
        let c1 = measure_single(x, opts.reps * 4, |row| compiled.decision_one(row));
        // The f32 path as a serving loop runs it: one scratch, no allocation per row.
        let mut scratch = vec![0f32; compiled.scratch_len()];
        let mut out = vec![0.0; sc.ncols()];
        let c32 = measure_single(x, opts.reps * 4, |row| {
            compiled.decision_one_f32_with(row, &mut scratch, &mut out);
            out.clone()
        });
        let cb = measure_batch(x, |b| compiled.decision(b));
        let cb32 = measure_batch(x, |b| compiled.decision_f32(b));
        r.timing = Timing {
            latency_us_exact_p50: Some(e1.p50_us),
            latency_us_exact_p99: Some(e1.p99_us),
            latency_us_compiled_p50: Some(c1.p50_us),
            latency_us_compiled_p99: Some(c1.p99_us),
            throughput_rows_per_s_exact: Some(eb),
            throughput_rows_per_s_compiled: Some(cb),
            speedup_single: Some(e1.p50_us / c1.p50_us),
            speedup_batch: Some(cb / eb),
            threads: Some(rayon::current_num_threads()),
            latency_us_compiled_f32_p50: Some(c32.p50_us),
            latency_us_exact_f32_p50: Some(et.single_f32.p50_us),
            speedup_single_f32: Some(et.single_f32.p50_us / c32.p50_us),
            throughput_rows_per_s_exact_f32: Some(et.rows_per_s_f32),
            throughput_rows_per_s_compiled_f32: Some(cb32),
            speedup_batch_f32: Some(cb32 / et.rows_per_s_f32),
            ..Timing::default()
        };
        if exact.task().is_classifier() {
            // The exact f32 path's labels against its f64 labels, row by row.
            let mut e32 = Array2::<f64>::zeros(se.dim());
            for (i, row) in x.rows().into_iter().enumerate() {
                let v = exact.decision_one_f32(&row.to_vec());
                e32.row_mut(i).assign(&ndarray::ArrayView1::from(&v));
            }
            let k = exact.labels().len();
            let le = label_indices(exact.task(), k, se.view());
            let l32 = label_indices(exact.task(), k, e32.view());
            r.agreement_exact_f32 =
                Some(le.iter().zip(&l32).filter(|(a, b)| a == b).count() as f64 / n.max(1) as f64);
            // Both f32 batch paths against the exact f64 labels.
            let agree = |s: Array2<f64>| {
                let l = label_indices(exact.task(), k, s.view());
                le.iter().zip(&l).filter(|(a, b)| a == b).count() as f64 / n.max(1) as f64
            };
            r.agreement_f32_batch = Some(agree(compiled.decision_f32(x)));
            r.agreement_exact_f32_batch = Some(agree(exact.decision_f32(x)));
        }
    }
    Ok(r)
}

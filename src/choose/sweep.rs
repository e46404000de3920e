//! The sweep: every (method, feature count) pair compiled from one shared teacher, reported
//! on the same evaluation rows, timed, and predicted.

use super::{loss_of, mark_front, Record};
use crate::cost::{predict, predict_exact, program_lines, MachineProfile, Prediction};
use crate::features::{FeatureSpec, Method};
use crate::fit::{audit_row, RidgeGrid, Teacher};
use crate::model::guarded::{choose_guard_auto, GuardTarget};
use crate::model::{CompiledModel, GuardedModel};
use crate::observe::{Observer, Silent};
use crate::report::{self, measure_exact, ReportOptions};
use crate::{Error, Result};
use ndarray::ArrayView2;
use std::time::Instant;

/// What to sweep.
#[derive(Debug, Clone)]
pub struct SweepOptions {
    /// Methods.
    pub methods: Vec<Method>,
    /// Feature counts.
    pub features: Vec<usize>,
    /// Seed of every map.
    pub seed: u64,
    /// Ridge strengths tried per candidate.
    pub grid: RidgeGrid,
    /// Report settings (tolerance, timing, repetitions).
    pub report: ReportOptions,
    /// Also a guarded point per candidate (classifiers): the exact model answers the rows
    /// below the threshold that meets this agreement on the calibration audit rows.
    pub guard_agreement: Option<f64>,
}

/// A finished sweep.
#[derive(Debug, Clone)]
pub struct Sweep {
    /// One record per compiled pair, then the exact model's.
    pub records: Vec<Record>,
    /// Pairs that could not be built, with the reason.
    pub skipped: Vec<(String, usize, String)>,
    /// Notes from sampling.
    pub notes: Vec<String>,
    /// The loss's name (`disagreement` or `relative decision RMSE`).
    pub loss_name: String,
    /// Rows the figures were computed on.
    pub n_rows: usize,
}

/// The guarded version of `model`: threshold for agreement `p` on the audit rows, report
/// on `eval`; its latency is the mean over the rows (the guard's cost), its prediction the
/// compiled prediction plus the fallback share of the exact model's.
#[allow(clippy::too_many_arguments)]
fn guarded_point(
    teacher: &Teacher,
    model: &CompiledModel,
    eval: ArrayView2<f64>,
    truth: Option<&[String]>,
    ropts: &ReportOptions,
    p: f64,
    profile: &MachineProfile,
    predicted: Prediction,
) -> Result<Option<Record>> {
    let exact = teacher.exact();
    let (xa, ya) = teacher.rows_where(audit_row);
    let sc = model.decision(xa.view());
    let Some(choice) = choose_guard_auto(exact, sc.view(), ya.view(), GuardTarget::Agreement(p))
    else {
        return Ok(None);
    };
    let share = choice.work_share;
    let g = GuardedModel::with_rule(model.clone(), exact.clone(), choice.threshold, choice.rule)?;
    let r = report::build_guarded(&g, exact, eval, truth, ropts)?;
    let pe = predict_exact(profile, exact);
    Ok(Some(Record {
        method: String::new(),
        features: model.features(),
        exact: false,
        loss: loss_of(&r),
        agreement: r.agreement,
        latency_us: r.timing.latency_us_compiled_mean.unwrap_or(f64::NAN),
        rows_per_s: r.timing.throughput_rows_per_s_compiled.unwrap_or(f64::NAN),
        bytes: r.bytes_compiled,
        predicted: Prediction {
            latency_us: predicted.latency_us + share * pe.latency_us,
            rows_per_s: 1.0 / (1.0 / predicted.rows_per_s + share / pe.rows_per_s),
            param_bytes: predicted.param_bytes + pe.param_bytes,
            flops: predicted.flops + (share * pe.flops as f64) as u64,
        },
        compile_s: 0.0,
        pareto: false,
        report: Some(r),
    }))
}

/// Runs the sweep: `eval` (raw rows) with optional true labels judges every candidate; the
/// teacher's calibration decisions are computed once. `obs` gets one unit per pair. With
/// `guard_agreement`, each classifier candidate also gets a guarded record (method
/// `<method>+guard`) whose latency is the mean single-row latency over the rows.
pub fn run_sweep(
    teacher: &Teacher,
    eval: ArrayView2<f64>,
    truth: Option<&[String]>,
    profile: &MachineProfile,
    opts: &SweepOptions,
    obs: &dyn Observer,
) -> Result<Sweep> {
    let exact = teacher.exact();
    if opts.methods.is_empty() || opts.features.is_empty() {
        return Err(Error::input(
            "a sweep needs at least one method and one feature count",
        ));
    }
    if eval.nrows() == 0 {
        return Err(Error::input("the evaluation data have no rows"));
    }
    let kernel = exact.kernel().clone();
    let d = exact.input_dim();
    let se = exact.decision(eval);
    let mut ropts = opts.report.clone();
    if ropts.timing {
        ropts.exact_timing = Some(measure_exact(exact, eval, &ropts));
    }
    let mut records = Vec::new();
    let mut skipped = Vec::new();
    let mut notes = Vec::new();
    let pairs: Vec<(Method, usize)> = opts
        .methods
        .iter()
        .flat_map(|m| opts.features.iter().map(move |f| (*m, *f)))
        .collect();
    // Progress in units of work, not pairs: a pair's distillation costs about n·(D² + d·D)
    // multiply-adds for the statistics plus D³ for the solve, so the last, largest pairs
    // dominate and a count of pairs would promise far too early an end.
    let n = teacher.raw().nrows();
    let total: u64 = pairs.iter().map(|&(_, f)| pair_work(n, d, f)).sum();
    obs.stage("sweep (work in millions of multiply-adds)", total);
    for (m, f) in pairs {
        let w = pair_work(n, d, f);
        let spec = FeatureSpec::new(kernel.clone(), m, d, f, opts.seed);
        if let Err(e) = spec.validate() {
            skipped.push((m.name().to_string(), f, e.message().to_string()));
            obs.advance(w);
            continue;
        }
        let t0 = Instant::now();
        let (model, info) = match teacher.distil(&spec, &opts.grid, None, &Silent) {
            Ok(x) => x,
            Err(e) => {
                skipped.push((m.name().to_string(), f, e.message().to_string()));
                obs.advance(w);
                continue;
            }
        };
        let compile_s = t0.elapsed().as_secs_f64();
        for n in info.notes {
            if !notes.contains(&n) {
                notes.push(n);
            }
        }
        let r = report::build(&model, exact, eval, truth, Some(se.clone()), &ropts)?;
        let lines = program_lines(
            model.program(),
            model.n_outputs(),
            model.scaling().is_some(),
        );
        let predicted = predict(profile, &lines);
        records.push(Record {
            method: m.name().to_string(),
            features: f,
            exact: false,
            loss: loss_of(&r),
            agreement: r.agreement,
            latency_us: r.timing.latency_us_compiled_p50.unwrap_or(f64::NAN),
            rows_per_s: r.timing.throughput_rows_per_s_compiled.unwrap_or(f64::NAN),
            bytes: r.bytes_compiled,
            predicted,
            compile_s,
            pareto: false,
            report: Some(r),
        });
        if let (Some(p), true) = (opts.guard_agreement, exact.task().is_classifier()) {
            let point = guarded_point(teacher, &model, eval, truth, &ropts, p, profile, predicted)?;
            match point {
                Some(rec) => records.push(Record {
                    method: format!("{}+guard", m.name()),
                    features: f,
                    compile_s,
                    ..rec
                }),
                None => skipped.push((
                    format!("{}+guard", m.name()),
                    f,
                    format!(
                        "no guard reaches agreement {p} with 95% confidence on the {} calibration audit rows, even sending every row to the exact model",
                        teacher.raw().nrows() / 10
                    ),
                )),
            }
        }
        obs.advance(w);
    }
    obs.finish();
    let et = ropts.exact_timing;
    records.push(Record {
        method: "exact".into(),
        features: exact.n_support_vectors(),
        exact: true,
        loss: 0.0,
        agreement: exact.task().is_classifier().then_some(1.0),
        latency_us: et.map(|t| t.single.p50_us).unwrap_or(f64::NAN),
        rows_per_s: et.map(|t| t.rows_per_s).unwrap_or(f64::NAN),
        bytes: exact.parameter_bytes(),
        predicted: predict_exact(profile, exact),
        compile_s: 0.0,
        pareto: false,
        report: None,
    });
    if opts.report.timing {
        mark_front(&mut records);
    }
    Ok(Sweep {
        records,
        skipped,
        notes,
        loss_name: if exact.task().is_classifier() {
            "disagreement".into()
        } else {
            "relative decision RMSE".into()
        },
        n_rows: eval.nrows(),
    })
}

/// The work of distilling one candidate with `f` features from `n` calibration rows of `d`
/// columns, in millions of multiply-adds (at least 1): `n·(f² + d·f) + f³`.
/// Multiply-adds of distilling one candidate of `f` features over `n` rows of `d` columns
/// with `k` outputs and `solves` ridge solves: the statistics (`ZᵀZ`, `Zᵀy`) and a dense
/// map's projection per row, then per solve a Cholesky factorisation (`f³/3`) and `k`
/// right-hand sides (`2·f²·k`).
fn distil_madds(n: usize, d: usize, k: usize, f: usize, solves: usize) -> f64 {
    let (n, d, k, f, sv) = (n as f64, d as f64, k as f64, f as f64, solves as f64);
    n * (f * f + d * f + f * k) + sv * (f * f * f / 3.0 + 2.0 * f * f * k)
}

/// The cost model's estimate, in seconds, of the distillations of a sweep of `methods`
/// methods over `features` on `n` calibration rows of `d` columns with `k` outputs: the
/// multiply-adds of [`distil_madds`] (one solve per ridge strength of `grid`, and the
/// final refit) at the machine's measured matrix-product rate on `threads` threads. It
/// leaves out the timing of each candidate and the work of maps cheaper than a dense
/// projection, so it errs long for structured maps and short where timing dominates
/// (`sweep` prints the estimate before it starts and the time taken at the end).
///
/// ```
/// use kernelpress::choose::estimate_sweep_seconds;
/// use kernelpress::cost::MachineProfile;
/// use kernelpress::fit::RidgeGrid;
/// let p = MachineProfile::nominal();
/// let a = estimate_sweep_seconds(10_000, 16, 325, &[1024], 1, &RidgeGrid::standard(), &p, 2);
/// let b = estimate_sweep_seconds(10_000, 16, 325, &[1024, 4096], 7, &RidgeGrid::standard(), &p, 2);
/// assert!(a > 0.0 && b > 50.0 * a);
/// ```
#[allow(clippy::too_many_arguments)]
pub fn estimate_sweep_seconds(
    n: usize,
    d: usize,
    k: usize,
    features: &[usize],
    methods: usize,
    grid: &RidgeGrid,
    profile: &MachineProfile,
    threads: usize,
) -> f64 {
    let solves = grid.relative.len() + 1;
    let madds: f64 = features
        .iter()
        .map(|&f| distil_madds(n, d, k, f, solves))
        .sum::<f64>()
        * methods as f64;
    let per_ns = profile.gemm_flops_per_ns.max(1e-3) * threads.max(1) as f64;
    2.0 * madds / per_ns * 1e-9
}

fn pair_work(n: usize, d: usize, f: usize) -> u64 {
    let (n, d, f) = (n as f64, d as f64, f as f64);
    ((n * (f * f + d * f) + f * f * f) / 1e6).max(1.0) as u64
}

#[cfg(test)]
mod work_tests {
    #[test]
    fn the_estimate_counts_the_outputs_and_the_solves() {
        // By hand: 1,000 rows, 10 columns, 2 outputs, 100 features, 8 solves:
        // statistics 1000·(100² + 10·100 + 100·2) = 11.2 M; solves 8·(100³/3 + 2·100²·2)
        // = 8·(333,333.3 + 40,000) = 2.987 M multiply-adds.
        let m = super::distil_madds(1000, 10, 2, 100, 8);
        assert!(
            (m - (11_200_000.0 + 8.0 * (1e6 / 3.0 + 40_000.0))).abs() < 1e-3,
            "{m}"
        );
        // Hundreds of outputs weigh (the ridge solve's right-hand sides): 325 one-vs-one
        // outputs at 1,024 features on 15,000 rows cost about half as much again as one
        // output (1.55×).
        let p = crate::cost::MachineProfile::nominal();
        let g = crate::fit::RidgeGrid::standard();
        let one = super::estimate_sweep_seconds(15_000, 16, 1, &[1024], 1, &g, &p, 1);
        let many = super::estimate_sweep_seconds(15_000, 16, 325, &[1024], 1, &g, &p, 1);
        assert!(many > 1.5 * one && many < 1.6 * one, "{one} {many}");
        // Twice the threads, half the time.
        let two = super::estimate_sweep_seconds(15_000, 16, 325, &[1024], 1, &g, &p, 2);
        assert!((two * 2.0 - many).abs() < 1e-9 * many);
    }

    #[test]
    fn larger_candidates_weigh_more() {
        // 8,000 rows of 8 columns: 4,096 features weigh about 21× 1,024 (16× from the D²
        // term, more from the D³ solve).
        let (a, b) = (
            super::pair_work(8000, 8, 1024),
            super::pair_work(8000, 8, 4096),
        );
        assert!(b > 16 * a && b < 24 * a, "{a} {b}");
        assert_eq!(super::pair_work(10, 2, 4), 1);
    }
}

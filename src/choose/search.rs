//! The budget search: predict each candidate's speed and size, grow the feature count per
//! method while the prediction fits, compile only what can fit, and judge the compiled
//! candidates on the audit rows of the calibration set ([`crate::fit::audit_row`]: never
//! fitted on, never used to choose a ridge strength), never on the user's evaluation data.

use super::Record;
use crate::cost::{predict, predict_exact, program_lines, MachineProfile, Prediction};
use crate::features::{FeatureSpec, Method};
use crate::fit::{audit_row, RidgeGrid, Teacher};
use crate::model::guarded::{choose_guard_auto, GuardTarget};
use crate::model::{label_indices, CompiledModel, GuardedModel};
use crate::observe::{Observer, Silent};
use crate::report::measure_single;
use crate::{Error, Result};
use ndarray::ArrayView2;
use std::time::Instant;

/// The constraints of a search (at least one).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Budget {
    /// Single-row latency, median (µs).
    pub latency_us: Option<f64>,
    /// Parameter bytes.
    pub max_bytes: Option<u64>,
    /// Largest acceptable loss (disagreement for classifiers).
    pub max_loss: Option<f64>,
}

/// Predictions may be this much above the latency budget and still be compiled and
/// measured (the cost model's error on the demo and Fashion-MNIST models is within ±25%).
pub const PREDICTION_SLACK: f64 = 1.3;

impl Budget {
    /// The budget, or what is wrong with it: at least one bound, a latency that is a
    /// positive number of microseconds, a largest loss in [0, 1) for classifiers (any
    /// non-negative loss otherwise is checked by the caller's task).
    ///
    /// ```
    /// use kernelpress::choose::Budget;
    /// let b = Budget { latency_us: Some(10.0), ..Budget::default() };
    /// assert!(b.checked().is_ok());
    /// assert!(Budget::default().checked().is_err());
    /// assert!(Budget { latency_us: Some(-1.0), ..b }.checked().is_err());
    /// assert!(Budget { max_loss: Some(1.0), ..b }.checked().is_err());
    /// ```
    pub fn checked(self) -> Result<Budget> {
        if self == Budget::default() {
            return Err(Error::input(
                "a search needs a budget: a latency, a size or a fidelity bound",
            ));
        }
        if let Some(b) = self.latency_us.filter(|b| !(*b > 0.0 && b.is_finite())) {
            return Err(Error::input(format!(
                "the latency budget {b} must be a positive number of microseconds"
            )));
        }
        if let Some(p) = self.max_loss.filter(|p| !(0.0..1.0).contains(p)) {
            return Err(Error::input(format!(
                "the largest disagreement {p} must be in [0, 1)"
            )));
        }
        Ok(self)
    }

    fn fits_prediction(&self, p: &Prediction) -> bool {
        self.latency_us
            .is_none_or(|b| p.latency_us <= b * PREDICTION_SLACK)
            && self.max_bytes.is_none_or(|b| p.param_bytes <= b)
    }

    /// True when a measured latency and a size fit the latency and size bounds (the
    /// fidelity bound is judged apart).
    pub fn fits(&self, latency_us: f64, bytes: u64) -> bool {
        self.latency_us.is_none_or(|b| latency_us <= b) && self.max_bytes.is_none_or(|b| bytes <= b)
    }
}

/// How to search.
#[derive(Debug, Clone)]
pub struct SearchOptions {
    /// Methods to try.
    pub methods: Vec<Method>,
    /// Feature counts to try, ascending.
    pub ladder: Vec<usize>,
    /// Seed of every map.
    pub seed: u64,
    /// Ridge strengths tried per candidate.
    pub grid: RidgeGrid,
    /// Single-row timing repetitions per candidate.
    pub reps: usize,
    /// With a fidelity bound (classifiers): also consider every compiled candidate guarded
    /// by the exact model (the rule with the least exact work, threshold for agreement
    /// `1 − max_loss` with 95% confidence on the audit rows), judged at its *mean*
    /// single-row latency; the fastest of all that meet the bound wins.
    pub guard: bool,
    /// Refine every candidate's map against the exact model before judging it
    /// ([`Teacher::distil_refined`]; methods without continuous parameters are distilled as
    /// usual, with a note). The audit rows that judge candidates are never refined on.
    pub refine: Option<crate::fit::RefineOptions>,
    /// Factor every candidate's head ([`Teacher::factor_head`]) before timing and judging
    /// it; candidates whose head no rank shrinks stay as they are.
    pub head_rank: Option<crate::fit::HeadRank>,
}

impl SearchOptions {
    /// Feature counts 64, 128, …, 8192.
    pub fn standard_ladder() -> Vec<usize> {
        (6..=13).map(|p| 1usize << p).collect()
    }
}

/// The outcome of a search.
#[derive(Debug, Clone)]
pub enum Choice {
    /// A compiled model meets the budget.
    Compiled {
        /// The model.
        model: Box<CompiledModel>,
        /// Its record on the audit rows of the calibration set.
        record: Box<Record>,
    },
    /// A compiled model guarded by the exact model meets the fidelity bound and is the
    /// fastest on average ([`SearchOptions::guard`]).
    Guarded {
        /// The model.
        model: Box<GuardedModel>,
        /// Its record on the audit rows (latency: the mean over the rows).
        record: Box<Record>,
    },
    /// The exact model meets the budget and is at least as fast as any compiled model that
    /// does: keep it.
    Exact {
        /// The exact model's record.
        exact: Box<Record>,
        /// The best compiled model that met the budget, if any.
        best_compiled: Option<Box<Record>>,
    },
    /// Nothing meets the budget.
    Nothing {
        /// The compiled candidate that came closest, if any was built.
        closest: Option<Box<Record>>,
        /// The smallest predicted latency of any candidate (method, features, prediction).
        fastest_predicted: Option<(String, usize, Prediction)>,
    },
}

/// A search's outcome, with every candidate built on the way.
#[derive(Debug, Clone)]
pub struct SearchResult {
    /// What was chosen.
    pub choice: Choice,
    /// Every compiled candidate (then the exact model's record, last).
    pub tried: Vec<Record>,
    /// Candidates skipped and why.
    pub notes: Vec<String>,
}

fn loss(
    task_classifier: bool,
    k: usize,
    task: crate::model::Task,
    y: ArrayView2<f64>,
    s: ArrayView2<f64>,
) -> (f64, Option<f64>) {
    if task_classifier {
        let a = label_indices(task, k, y);
        let b = label_indices(task, k, s);
        let agree = a.iter().zip(&b).filter(|(x, y)| x == y).count() as f64 / a.len() as f64;
        (1.0 - agree, Some(agree))
    } else {
        let n = y.len() as f64;
        let mean = y.sum() / n;
        let var = y.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
        let mse = y
            .iter()
            .zip(s.iter())
            .map(|(a, b)| (a - b).powi(2))
            .sum::<f64>()
            / n;
        (
            if var > 0.0 {
                (mse / var).sqrt()
            } else {
                mse.sqrt()
            },
            None,
        )
    }
}

/// Searches `opts.methods × opts.ladder` for the model that fits `budget`: with a fidelity
/// bound, the fastest model that meets it (growing the features per method until it does);
/// otherwise the most faithful model whose measured latency and size fit (the largest
/// feature count per method whose prediction fits, stepping down when the measurement does
/// not). The exact model is returned when it fits and is at least as fast.
pub fn search(
    teacher: &Teacher,
    profile: &MachineProfile,
    budget: Budget,
    opts: &SearchOptions,
    obs: &dyn Observer,
) -> Result<SearchResult> {
    let budget = budget.checked()?;
    let exact = teacher.exact();
    let classifier = exact.task().is_classifier();
    let k = exact.labels().len();
    let n = teacher.raw().nrows();
    let (xv, yv) = teacher.rows_where(audit_row);
    let reps = opts.reps.max(20);
    let el = measure_single(xv.view(), reps, |r| exact.decision_one(r));
    let exact_rec = Record {
        method: "exact".into(),
        features: exact.n_support_vectors(),
        exact: true,
        loss: 0.0,
        agreement: classifier.then_some(1.0),
        latency_us: el.p50_us,
        rows_per_s: f64::NAN,
        bytes: exact.parameter_bytes(),
        predicted: predict_exact(profile, exact),
        compile_s: 0.0,
        pareto: false,
        report: None,
    };
    let mut notes = Vec::new();
    let exact_fits = budget.fits(exact_rec.latency_us, exact_rec.bytes as u64);
    if exact_fits && budget.max_loss.is_none() {
        // Nothing is more faithful than the exact model, and it fits.
        return Ok(SearchResult {
            choice: Choice::Exact {
                exact: Box::new(exact_rec.clone()),
                best_compiled: None,
            },
            tried: vec![exact_rec],
            notes,
        });
    }
    // With a fidelity bound and an exact model that fits, only candidates faster than the
    // exact model are worth building.
    let cap = exact_fits.then_some(exact_rec.latency_us * PREDICTION_SLACK);
    let mut tried: Vec<Record> = Vec::new();
    let mut models: Vec<Candidate> = Vec::new();
    let mut fastest: Option<(String, usize, Prediction)> = None;
    let scaled = exact.scaling().is_some();
    obs.stage("searching", opts.methods.len() as u64);
    for &m in &opts.methods {
        // Predict up the ladder while the prediction fits. Rungs whose map comes out the
        // same size as an earlier one (Taylor and Maclaurin round to whole degrees) are
        // built once.
        let mut fit: Vec<(usize, Prediction)> = Vec::new();
        let mut sizes: Vec<usize> = Vec::new();
        for &f in &opts.ladder {
            let spec = FeatureSpec::new(exact.kernel().clone(), m, exact.input_dim(), f, opts.seed);
            if spec.from_data() && f > n {
                break;
            }
            if crate::limits::check_alloc(4 * (f as u64).pow(2), 8, "statistics").is_err() {
                notes.push(format!(
                    "{m} at {f} features: the distillation statistics exceed the memory ceiling"
                ));
                break;
            }
            let prog = match spec.cost_program(n) {
                Ok(p) => p,
                Err(e) => {
                    notes.push(format!("{m} at {f} features: {}", e.message()));
                    continue;
                }
            };
            if sizes.contains(&prog.output_dim()) {
                continue;
            }
            sizes.push(prog.output_dim());
            let p = predict(profile, &program_lines(&prog, exact.n_outputs(), scaled));
            if fastest
                .as_ref()
                .is_none_or(|(_, _, q)| p.latency_us < q.latency_us)
            {
                fastest = Some((m.name().to_string(), f, p));
            }
            if !budget.fits_prediction(&p) || cap.is_some_and(|c| p.latency_us > c) {
                break;
            }
            fit.push((f, p));
        }
        // Compile: ascending until the fidelity bound is met, or descending from the
        // largest that fits until the measurement fits too.
        let order: Vec<(usize, Prediction)> = if budget.max_loss.is_some() {
            fit.clone()
        } else {
            fit.iter().rev().copied().collect()
        };
        for (f, p) in order {
            let spec = FeatureSpec::new(exact.kernel().clone(), m, exact.input_dim(), f, opts.seed);
            let t0 = Instant::now();
            let built = match &opts.refine {
                Some(r) => match teacher.distil_refined(&spec, &opts.grid, None, r, &Silent) {
                    Ok((mdl, _, _)) => Ok(mdl),
                    // A map without continuous parameters (or derivatives) is refused as
                    // input: that candidate is distilled as usual.
                    Err(e) if e.kind() == crate::ErrorKind::Input => {
                        notes.push(format!("{m} at {f} features: not refined: {}", e.message()));
                        teacher
                            .distil(&spec, &opts.grid, None, &Silent)
                            .map(|(mdl, _)| mdl)
                    }
                    Err(e) => Err(e),
                },
                None => teacher
                    .distil(&spec, &opts.grid, None, &Silent)
                    .map(|(mdl, _)| mdl),
            };
            let model = match built {
                Ok(mdl) => mdl,
                Err(e) => {
                    notes.push(format!("{m} at {f} features: {}", e.message()));
                    continue;
                }
            };
            let model = match opts.head_rank {
                Some(r) if !model.is_folded() && model.n_outputs() > 1 => {
                    let (mdl, sum) = teacher.factor_head(&model, r)?;
                    if let Some(rank) = sum.rank {
                        notes.push(format!(
                            "{m} at {f} features: head factored to rank {rank} ({} weights instead of {})",
                            sum.weights.1, sum.weights.0
                        ));
                    }
                    mdl
                }
                _ => model,
            };
            let compile_s = t0.elapsed().as_secs_f64();
            let s = model.decision(xv.view());
            let (l, agreement) = loss(classifier, k, exact.task(), yv.view(), s.view());
            let mut lat = measure_single(xv.view(), reps, |r| model.decision_one(r));
            if budget.latency_us.is_some_and(|b| lat.p50_us > b) {
                // One more measurement before rejecting: a shared machine has noisy spells.
                let again = measure_single(xv.view(), reps, |r| model.decision_one(r));
                if again.p50_us < lat.p50_us {
                    lat = again;
                }
            }
            let rec = Record {
                method: m.name().to_string(),
                features: model.features(),
                exact: false,
                loss: l,
                agreement,
                latency_us: lat.p50_us,
                rows_per_s: f64::NAN,
                bytes: model.parameter_bytes(),
                predicted: p,
                compile_s,
                pareto: false,
                report: None,
            };
            let fits = budget.fits(rec.latency_us, rec.bytes as u64);
            let meets = budget.max_loss.is_none_or(|b| rec.loss <= b);
            let guarded = match budget.max_loss {
                Some(b) if opts.guard && classifier => guard_candidate(
                    &model,
                    exact,
                    xv.view(),
                    yv.view(),
                    s.view(),
                    1.0 - b,
                    reps,
                    &rec,
                    &exact_rec.predicted,
                )?,
                _ => None,
            };
            tried.push(rec);
            models.push(Candidate::Plain(Box::new(model)));
            if let Some((g, grec)) = guarded {
                tried.push(grec);
                models.push(Candidate::Guarded(Box::new(g)));
            }
            if budget.max_loss.is_some() {
                if meets || !fits {
                    break;
                }
            } else if fits {
                break;
            }
        }
        obs.advance(1);
    }
    obs.finish();
    let ok: Vec<usize> = (0..tried.len())
        .filter(|&i| {
            budget.fits(tried[i].latency_us, tried[i].bytes as u64)
                && budget.max_loss.is_none_or(|b| tried[i].loss <= b)
        })
        .collect();
    let best = if budget.max_loss.is_some() {
        ok.iter()
            .copied()
            .min_by(|&a, &b| tried[a].latency_us.total_cmp(&tried[b].latency_us))
    } else {
        ok.iter().copied().min_by(|&a, &b| {
            tried[a]
                .loss
                .total_cmp(&tried[b].loss)
                .then(tried[a].latency_us.total_cmp(&tried[b].latency_us))
        })
    };
    let exact_wins = exact_fits
        && best.is_none_or(|b| {
            exact_rec.latency_us <= tried[b].latency_us || budget.max_loss.is_none()
        });
    let choice = if exact_wins {
        Choice::Exact {
            exact: Box::new(exact_rec.clone()),
            best_compiled: best.map(|b| Box::new(tried[b].clone())),
        }
    } else if let Some(b) = best {
        match models.swap_remove(b) {
            Candidate::Plain(model) => Choice::Compiled {
                model,
                record: Box::new(tried[b].clone()),
            },
            Candidate::Guarded(model) => Choice::Guarded {
                model,
                record: Box::new(tried[b].clone()),
            },
        }
    } else {
        // Closest: the fastest built candidate for a latency or size budget, the most
        // faithful for a fidelity bound.
        let closest = if budget.max_loss.is_some() {
            tried.iter().min_by(|a, b| a.loss.total_cmp(&b.loss))
        } else {
            tried
                .iter()
                .min_by(|a, b| a.latency_us.total_cmp(&b.latency_us))
        }
        .map(|r| Box::new(r.clone()));
        Choice::Nothing {
            closest,
            fastest_predicted: fastest,
        }
    };
    tried.push(exact_rec);
    Ok(SearchResult {
        choice,
        tried,
        notes,
    })
}

/// A built candidate: plain or guarded.
enum Candidate {
    Plain(Box<CompiledModel>),
    Guarded(Box<GuardedModel>),
}

/// `model` guarded for agreement `target` on the audit rows `xv` (exact decisions `yv`,
/// compiled ones `s`), with its record (method `<method>+guard`, mean single-row latency,
/// its parameters and the exact model's); `None` when no threshold meets the target.
#[allow(clippy::too_many_arguments)]
fn guard_candidate(
    model: &CompiledModel,
    exact: &crate::model::ExactModel,
    xv: ArrayView2<f64>,
    yv: ArrayView2<f64>,
    s: ArrayView2<f64>,
    target: f64,
    reps: usize,
    plain: &Record,
    pe: &Prediction,
) -> Result<Option<(GuardedModel, Record)>> {
    let Some(c) = choose_guard_auto(exact, s, yv, GuardTarget::Agreement(target)) else {
        return Ok(None);
    };
    let mut g = GuardedModel::with_rule(model.clone(), exact.clone(), c.threshold, c.rule)?;
    g.guard = serde_json::json!({
        "chosen_on": format!("calibration audit rows ({} rows, never fitted on)", xv.nrows()),
        "target_agreement": target,
        "fallback_share": c.fallback_share,
        "work_share": c.work_share,
    });
    let lat = measure_single(xv, reps, |r| g.decision_one(r).0);
    let rec = Record {
        method: format!("{}+guard", plain.method),
        features: plain.features,
        exact: false,
        loss: 1.0 - c.agreement,
        agreement: Some(c.agreement),
        latency_us: lat.mean_us,
        rows_per_s: f64::NAN,
        bytes: model.parameter_bytes() + exact.parameter_bytes(),
        predicted: Prediction {
            latency_us: plain.predicted.latency_us + c.work_share * pe.latency_us,
            ..plain.predicted
        },
        compile_s: plain.compile_s,
        pareto: false,
        report: None,
    };
    Ok(Some((g, rec)))
}

//! Refinement: after the head fit, the map's own parameters move so that the compact model
//! reproduces the teacher more closely — reduced-set refinement (Burges 1996, "Simplified
//! support vector decision rules"; Burges & Schölkopf 1997) for landmarks, and learned
//! diagonals of structured transforms (Yang et al. 2015, "Deep Fried Convnets") for the
//! Hadamard and Fastfood maps. The program's shape and cost do not change.
//!
//! Each pass runs minibatch Adam (Kingma & Ba 2015) on the squared error between the
//! compact model's decision values and the teacher's over the head-fitting rows, the head
//! held fixed; then the head is refitted by ridge (the strength chosen on the ridge-choice
//! rows) and the pass is judged by that head's error on the ridge-choice rows. The best pass
//! is kept; two passes without improvement stop early. The audit rows are never read by any
//! of this (only the summary's before/after figures are measured on them).
//!
//! What moves: Nyström landmarks (not the projection after them: the ridge head absorbs
//! it), the frequencies and phases of the dense spectral maps, the input scaling of the
//! spectral maps (per-dimension inverse lengthscales), the sign diagonals of Hadamard and
//! Fastfood maps (as continuous diagonals, stored as `scale` steps) and the constant
//! output scale before their cosines (as one factor per frequency).

use super::compile::{check_spec, finish_model, landmark_pool, row_part, with_kind};
use super::refine_rows::{RefineRows, RefineSource, RefineState};
use super::{audit_row, HeadFit, Part, RidgeGrid, Teacher};
use crate::features::{FeatureMap, FeatureSpec, SampleInfo};
use crate::model::{CompiledModel, ExactModel};
use crate::observe::Observer;
use crate::program::{steps, Program, Step};
use crate::{Error, Result};
use ndarray::{ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use serde_json::json;

/// How to refine.
#[derive(Debug, Clone, PartialEq)]
pub struct RefineOptions {
    /// Most passes over the head-fitting rows (≥ 1).
    pub passes: usize,
    /// Adam step size relative to each tensor's root-mean-square value at the start.
    pub rate: f64,
    /// Rows per minibatch.
    pub batch: usize,
    /// Passes without improvement on the ridge-choice rows before stopping.
    pub patience: usize,
}

impl RefineOptions {
    /// `passes` (1–10,000) with the standard settings: step size 3·10⁻³ of each tensor's
    /// size, minibatches of 500 rows, stop after two passes without improvement.
    pub fn new(passes: usize) -> Result<RefineOptions> {
        RefineOptions {
            passes,
            rate: 3e-3,
            batch: 500,
            patience: 2,
        }
        .checked()
    }

    /// The options, or what is wrong with them.
    pub fn checked(self) -> Result<RefineOptions> {
        if !(1..=10_000).contains(&self.passes) {
            return Err(Error::input(format!(
                "refinement passes {}: expected 1 to 10000",
                self.passes
            )));
        }
        if !(self.rate > 0.0 && self.rate <= 1.0) {
            return Err(Error::input(format!(
                "refinement rate {}: expected a number in (0, 1]",
                self.rate
            )));
        }
        if !(1..=1_000_000).contains(&self.batch) || self.patience == 0 {
            return Err(Error::input(
                "refinement batch must be 1 to 1000000 rows and patience at least 1",
            ));
        }
        Ok(self)
    }
}

/// What a refinement did.
#[derive(Debug, Clone, PartialEq)]
pub struct RefineSummary {
    /// Passes run (the last ones may not have improved).
    pub passes_run: usize,
    /// The pass whose program was kept (0: none improved on the unrefined map).
    pub best_pass: usize,
    /// Mean squared decision error on the ridge-choice rows, before and after.
    pub choose_mse: (f64, f64),
    /// Label agreement with the teacher on the calibration audit rows, before and after
    /// (regression: minus the mean squared decision error).
    pub audit_agreement: (f64, f64),
    /// The tensors that moved, as `step{i}.{name}`.
    pub trained: Vec<String>,
    /// Wall-clock seconds.
    pub seconds: f64,
}

impl RefineSummary {
    /// The summary as stored in the model's fit record and report (without the seconds,
    /// so that model files stay bit-identical from run to run).
    pub fn to_json(&self) -> serde_json::Value {
        json!({
            "passes": self.passes_run,
            "best_pass": self.best_pass,
            "choose_mse_before": self.choose_mse.0,
            "choose_mse_after": self.choose_mse.1,
            "agreement_before": self.audit_agreement.0,
            "agreement_after": self.audit_agreement.1,
            "judged_on": "calibration audit rows (every tenth row; never fitted on, never used to choose)",
            "trained": self.trained,
        })
    }
}

/// The program with its discrete diagonals made continuous: sign diagonals become `scale`
/// steps, and a constant scale that feeds a cosine becomes one factor per frequency.
fn loosen(p: &Program) -> Result<Program> {
    let mut out = p.clone();
    for (i, ins) in p.instrs().iter().enumerate() {
        let feeds_trig = p.instrs().iter().any(|j| {
            j.inputs.iter().any(|v| v.0 == i + 1)
                && matches!(j.step, Step::CosSin(_) | Step::CosPhase(_))
        });
        let new = match &ins.step {
            Step::Signs(sg) => Some(steps::Scale::new(
                sg.signs().iter().map(|v| *v as f64).collect(),
            )?),
            Step::ConstScale(c) if feeds_trig => Some(steps::Scale::new(vec![
                c.value();
                p.dim(
                    crate::program::ValueId(i + 1)
                )
            ])?),
            _ => None,
        };
        if let Some(st) = new {
            out = out.with_step(i, st.into())?;
        }
    }
    Ok(out)
}

/// Adam state of one tensor.
struct Adam {
    m: Vec<f64>,
    v: Vec<f64>,
    lr: f64,
}

impl Teacher<'_> {
    /// Distils a head for `spec` as [`Teacher::distil`] does, then refines the map's
    /// parameters against the teacher (see the module documentation) and refits the head.
    pub fn distil_refined(
        &self,
        spec: &FeatureSpec,
        grid: &RidgeGrid,
        landmarks: Option<ArrayView2<f64>>,
        opts: &RefineOptions,
        obs: &dyn Observer,
    ) -> Result<(CompiledModel, SampleInfo, RefineSummary)> {
        let exact = self.exact();
        check_spec(exact, spec)?;
        let opts = opts.clone().checked()?;
        // Landmarks drawn from calibration rows come from the non-audit rows only, so
        // that the audit figures judge rows the map has never seen.
        let seen: Vec<usize> = (0..self.scaled().nrows())
            .filter(|&i| !audit_row(i))
            .collect();
        let seen_rows = self.scaled().select(Axis(0), &seen);
        let pool = landmark_pool(exact, landmarks, Some(seen_rows.view()), spec);
        let (map, info) = spec.sample(Some(
            pool.as_ref().map(|p| p.view()).unwrap_or(seen_rows.view()),
        ))?;
        let mut rows = vec![RefineRows::borrowed(
            exact,
            self.scaled(),
            self.decisions(),
            0,
        )];
        let (m, summary) = refine_with(exact, map, grid, &opts, &mut rows, obs)?;
        Ok((m, info, summary))
    }
}

/// Refines `spec`'s map over calibration rows held elsewhere — shards in other processes
/// or on other machines, reached through `source` — with the map every shard can draw
/// ([`super::shard::shard_map`]: data-independent methods, or Nyström on the teacher's
/// support vectors). Each pass's gradients and statistics are the sums of the shards'
/// answers, so the result equals [`Teacher::distil_refined`] over the same rows up to the
/// rounding of those sums.
pub fn refine_sharded(
    exact: &ExactModel,
    spec: &FeatureSpec,
    grid: &RidgeGrid,
    opts: &RefineOptions,
    source: &mut dyn RefineSource,
    obs: &dyn Observer,
) -> Result<(CompiledModel, RefineSummary)> {
    let map = super::shard::shard_map(exact, spec)?;
    let opts = opts.clone().checked()?;
    let (mut m, summary) = refine_with(exact, map, grid, &opts, source, obs)?;
    m.fit["refine"]["sharded"] = json!(true);
    Ok((m, summary))
}

/// The refinement driver: refines `map` against the teacher whose rows `source` holds.
pub(crate) fn refine_with(
    exact: &ExactModel,
    map: FeatureMap,
    grid: &RidgeGrid,
    opts: &RefineOptions,
    source: &mut dyn RefineSource,
    obs: &dyn Observer,
) -> Result<(CompiledModel, RefineSummary)> {
    let started = std::time::Instant::now();
    super::check_statistics_memory(map.output_dim())?;
    let spec = map.spec.clone();
    let prog = loosen(&map.program)?;
    let mut state = RefineState::new(spec.clone(), exact.fingerprint(), prog, exact.n_outputs());
    if !state.train.iter().any(|t| *t) {
        return Err(Error::input(format!(
            "method {} has no continuous parameters to refine (its map is fixed by hashes or the kernel); drop --refine",
            spec.method
        )));
    }
    if let Some(ins) = state
        .program
        .instrs()
        .iter()
        .find(|i| !i.step.differentiable())
    {
        return Err(Error::input(format!(
            "refinement needs the derivative of every step; step {} ({}) has none (the arc-cosine kernel's angle); drop --refine",
            ins.step.name(),
            ins.step.describe()
        )));
    }
    let trained = state.trained();
    obs.stage("fitting the head", 0);
    let stats = source.statistics(&state)?;
    // The head-fitting rows, from the rows the source covers.
    let fit_rows: Vec<usize> = stats
        .ranges()
        .iter()
        .flat_map(|&(a, b)| a..b)
        .filter(|&i| row_part(i) == Part::Fit)
        .collect();
    let mut fit = stats.distiller().solve(grid)?;
    state.head = fit.head.clone();
    state.intercept = fit.intercept.clone();
    let before = (choose_mse(&fit), source.audit(&state)?.figure());
    let mut best = (before.0, state.program.clone(), fit.clone(), 0usize);
    let mut adam: Vec<Option<Adam>> = state
        .program
        .instrs()
        .iter()
        .zip(&state.train)
        .map(|(ins, t)| {
            t.then(|| {
                let p = ins.step.params();
                let rms = (p.iter().map(|v| v * v).sum::<f64>() / p.len() as f64).sqrt();
                Adam {
                    m: vec![0.0; p.len()],
                    v: vec![0.0; p.len()],
                    lr: opts.rate * if rms > 0.0 { rms } else { 1.0 },
                }
            })
        })
        .collect();
    let (mut t, mut bad, mut passes) = (0i32, 0usize, 0usize);
    for pass in 1..=opts.passes {
        passes = pass;
        let mut order = fit_rows.clone();
        let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(spec.seed ^ (pass as u64) << 32);
        order.shuffle(&mut rng);
        let batches = order.len().div_ceil(opts.batch);
        obs.stage(
            &format!("refining, pass {pass} of {}", opts.passes),
            batches as u64 + 1,
        );
        for b in order.chunks(opts.batch) {
            let g = source.gradient(&state, b)?;
            if g.len() != adam.len() {
                return Err(Error::input(
                    "a refinement gradient does not match the program (a shard answered for another program)",
                ));
            }
            t += 1;
            for (i, st) in adam.iter_mut().enumerate() {
                let Some(st) = st else { continue };
                let g = &g[i];
                if g.len() != st.m.len() {
                    return Err(Error::input(
                        "a refinement gradient does not match the program (a shard answered for another program)",
                    ));
                }
                let mut theta = state.program.instrs()[i].step.params();
                let (b1, b2, eps) = (0.9f64, 0.999f64, 1e-8);
                let (c1, c2) = (1.0 - b1.powi(t), 1.0 - b2.powi(t));
                for j in 0..theta.len() {
                    st.m[j] = b1 * st.m[j] + (1.0 - b1) * g[j];
                    st.v[j] = b2 * st.v[j] + (1.0 - b2) * g[j] * g[j];
                    theta[j] -= st.lr * (st.m[j] / c1) / ((st.v[j] / c2).sqrt() + eps);
                }
                state.program.set_params(i, &theta)?;
            }
            obs.advance(1);
        }
        fit = source.statistics(&state)?.distiller().solve(grid)?;
        state.head = fit.head.clone();
        state.intercept = fit.intercept.clone();
        obs.advance(1);
        let e = choose_mse(&fit);
        if e < best.0 {
            best = (e, state.program.clone(), fit.clone(), pass);
            bad = 0;
        } else {
            bad += 1;
            if bad >= opts.patience {
                break;
            }
        }
    }
    obs.finish();
    let (e, prog, fit, best_pass) = best;
    state.program = prog;
    state.head = fit.head.clone();
    state.intercept = fit.intercept.clone();
    let after = source.audit(&state)?.figure();
    let summary = RefineSummary {
        passes_run: passes,
        best_pass,
        choose_mse: (before.0, e),
        audit_agreement: (before.1, after),
        trained,
        seconds: started.elapsed().as_secs_f64(),
    };
    let mut j = with_kind(&fit, "distill");
    j["refine"] = summary.to_json();
    let map = FeatureMap {
        spec: map.spec,
        program: state.program,
    };
    finish_model(exact, map, fit.head, fit.intercept, j).map(|m| (m, summary))
}

/// The ridge-choice error of a head fit (the smallest over its ridge grid).
fn choose_mse(f: &HeadFit) -> f64 {
    f.holdout_mse
        .iter()
        .map(|(_, m)| *m)
        .fold(f64::INFINITY, f64::min)
}

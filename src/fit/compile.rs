//! Orchestration of a compile: sample the map, stream calibration chunks through the
//! teacher and the map into a [`Distiller`], solve, build the [`CompiledModel`].

use super::{project, Distiller, HeadFit, Part, RidgeGrid};
use crate::data::Standardizer;
use crate::exact::ridge::targets;
use crate::features::{FeatureSpec, Landmarks, SampleInfo};
use crate::model::{CompiledModel, ExactModel};
use crate::observe::Observer;
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, Axis};
use serde_json::json;

/// How the head is fitted.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HeadKind {
    /// Dual expansion pushed through the map (no data).
    Project,
    /// Ridge regression to the teacher's decision values.
    Distill,
}

/// Rows per streamed chunk.
pub const FIT_CHUNK: usize = 2048;

/// Audit rows of a calibration set: every tenth row (index ≡ 9 mod 10, i.e. rows 10, 20,
/// … counting from 1). They are never fitted on and never choose the ridge strength; a
/// compile's report without evaluation data, and the budget search, judge on them.
pub fn audit_row(i: usize) -> bool {
    i % 10 == 9
}

/// What calibration row `i` is for: audit rows are skipped; of the rest, index ≡ 4 mod 10
/// chooses the ridge strength (10% of the rows), the others (80%) fit the head; the final
/// head is refit on both (90%).
pub fn row_part(i: usize) -> Part {
    if audit_row(i) {
        Part::Skip
    } else if i % 10 == 4 {
        Part::Choose
    } else {
        Part::Fit
    }
}

/// The teacher's side of a distillation, computed once and shared by every candidate map:
/// the calibration rows (raw and in the model's scaled input space) and the exact model's
/// decision values on them.
#[derive(Debug, Clone)]
pub struct Teacher<'a> {
    exact: &'a ExactModel,
    raw: ArrayView2<'a, f64>,
    scaled: Array2<f64>,
    y: Array2<f64>,
}

impl<'a> Teacher<'a> {
    /// Evaluates `exact` on the raw calibration rows `calib` (in chunks, reported to `obs`).
    pub fn new(
        exact: &'a ExactModel,
        calib: ArrayView2<'a, f64>,
        obs: &dyn Observer,
    ) -> Result<Self> {
        let n = calib.nrows();
        if n < 10 {
            return Err(Error::input(format!(
                "distillation needs at least 10 calibration rows, got {n}"
            )));
        }
        if calib.ncols() != exact.input_dim() {
            return Err(Error::input(format!(
                "calibration data have {} features; the model expects {}",
                calib.ncols(),
                exact.input_dim()
            )));
        }
        let mut y = Array2::zeros((n, exact.n_outputs()));
        let chunks = n.div_ceil(FIT_CHUNK);
        obs.stage("teacher decisions", chunks as u64);
        for c in 0..chunks {
            let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
            let yc = exact.decision(calib.slice(s![r.clone(), ..]));
            if let Some(i) = yc.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: the exact model's decision value is not finite (overflow); the kernel or the data are too extreme",
                    r.start + i / yc.ncols().max(1) + 1
                )));
            }
            y.slice_mut(s![r, ..]).assign(&yc);
            obs.advance(1);
        }
        obs.finish();
        Ok(Teacher {
            exact,
            raw: calib,
            scaled: exact.scale_inputs(calib),
            y,
        })
    }

    /// The exact model.
    pub fn exact(&self) -> &'a ExactModel {
        self.exact
    }

    /// Calibration rows, raw.
    pub fn raw(&self) -> ArrayView2<'a, f64> {
        self.raw
    }

    /// Calibration rows in the model's scaled input space.
    pub fn scaled(&self) -> ArrayView2<'_, f64> {
        self.scaled.view()
    }

    /// The exact model's decision values on the calibration rows.
    pub fn decisions(&self) -> ArrayView2<'_, f64> {
        self.y.view()
    }

    /// The calibration rows (raw) whose index satisfies `keep`, with the exact model's
    /// decision values on them (e.g. the audit rows: `rows_where(audit_row)`).
    pub fn rows_where(&self, keep: impl Fn(usize) -> bool) -> (Array2<f64>, Array2<f64>) {
        let idx: Vec<usize> = (0..self.raw.nrows()).filter(|&i| keep(i)).collect();
        (self.raw.select(Axis(0), &idx), self.y.select(Axis(0), &idx))
    }

    /// Distils a head for `spec` (landmarks from `landmarks`, raw, when given, else from the
    /// calibration rows).
    pub fn distil(
        &self,
        spec: &FeatureSpec,
        grid: &RidgeGrid,
        landmarks: Option<ArrayView2<f64>>,
        obs: &dyn Observer,
    ) -> Result<(CompiledModel, SampleInfo)> {
        let exact = self.exact;
        check_spec(exact, spec)?;
        let pool = landmark_pool(exact, landmarks, Some(self.scaled.view()), spec);
        let (map, info) = spec.sample(Some(
            pool.as_ref()
                .map(|p| p.view())
                .unwrap_or(self.scaled.view()),
        ))?;
        let n = self.raw.nrows();
        let p = map.output_dim() as u64;
        crate::limits::check_alloc(
            4 * p * p,
            8,
            &format!("the distillation statistics for {p} features (4·D² values)"),
        )?;
        let mut dist = Distiller::new(map.output_dim(), exact.n_outputs());
        let chunks = n.div_ceil(FIT_CHUNK);
        obs.stage("distilling", chunks as u64 + 1);
        for c in 0..chunks {
            let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
            let z = map.transform(self.scaled.slice(s![r.clone(), ..]));
            if let Some(i) = z.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: a feature is not finite (overflow); the kernel or the data are too extreme",
                    r.start + i / z.ncols().max(1) + 1
                )));
            }
            dist.add(z.view(), self.y.slice(s![r, ..]), row_part);
            obs.advance(1);
        }
        obs.stage("ridge solve", 1);
        let fit = dist.solve(grid)?;
        obs.finish();
        let j = with_kind(&fit, "distill");
        finish_model(exact, map, fit.head, fit.intercept, j).map(|m| (m, info))
    }
}

/// The Nyström landmark pool in the model's scaled space: the user's landmark rows when
/// given; for the `support` rule, the teacher's support vectors by total |coefficient|
/// (largest first; ties by index), topped up with calibration rows drawn uniformly (seeded)
/// when the landmarks outnumber them; otherwise none (the calibration rows are the pool).
pub(super) fn landmark_pool(
    exact: &ExactModel,
    landmarks: Option<ArrayView2<f64>>,
    calib_scaled: Option<ArrayView2<f64>>,
    spec: &FeatureSpec,
) -> Option<Array2<f64>> {
    if let Some(l) = landmarks {
        return Some(exact.scale_inputs(l));
    }
    if !(spec.from_data() && spec.options.landmarks == Landmarks::Support) {
        return None;
    }
    let sv = exact.support_vectors();
    let w: Vec<f64> = exact
        .coef()
        .rows()
        .into_iter()
        .map(|r| r.iter().map(|c| c.abs()).sum())
        .collect();
    let mut order: Vec<usize> = (0..sv.nrows()).collect();
    order.sort_by(|&a, &b| w[b].total_cmp(&w[a]).then(a.cmp(&b)));
    let l = spec.features;
    order.truncate(l);
    let mut pool = sv.select(Axis(0), &order);
    if let (true, Some(c)) = (l > order.len(), calib_scaled) {
        use rand::seq::SliceRandom;
        use rand::SeedableRng;
        let extra = (l - order.len()).min(c.nrows());
        let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(spec.seed ^ 0x5eed_1a4d);
        let mut idx: Vec<usize> = (0..c.nrows()).collect();
        let mut pick = idx.partial_shuffle(&mut rng, extra).0.to_vec();
        pick.sort_unstable();
        let top = c.select(Axis(0), &pick);
        pool = ndarray::concatenate(Axis(0), &[pool.view(), top.view()]).expect("same width");
    }
    Some(pool)
}

/// Multiples of the kernel's bandwidth that [`Teacher::distil_tuned`] tries for random
/// maps (the kernel's own first, so that ties keep it).
pub const BANDWIDTH_MULTIPLES: [f64; 3] = [1.0, 0.5, 0.7];

/// Fails early when the distillation statistics of `features` features (4·D² values)
/// cannot fit under the memory ceiling.
pub fn check_statistics_memory(features: usize) -> Result<()> {
    let p = features as u64;
    crate::limits::check_alloc(
        4 * p * p,
        8,
        &format!("the distillation statistics for {p} features (4·D² values)"),
    )
}

impl Teacher<'_> {
    /// Distils one head per multiple of the map's bandwidth (`multiples`, e.g.
    /// [`BANDWIDTH_MULTIPLES`]) and keeps the model that reproduces the teacher best on the
    /// ridge-choice rows (index ≡ 4 mod 10; never the audit rows): the largest label
    /// agreement for classifiers, the smallest mean squared decision error for regression;
    /// a multiple replaces the best so far only when it gains more than one standard error
    /// of the agreement (regression: 1% of the error), so noise keeps the kernel's own.
    /// The tries are recorded in the head fit (`bandwidth_search`). Maps that cannot take
    /// another bandwidth (landmark methods, kernels that are not shift-invariant) are
    /// distilled once.
    pub fn distil_tuned(
        &self,
        spec: &FeatureSpec,
        grid: &RidgeGrid,
        multiples: &[f64],
        obs: &dyn Observer,
    ) -> Result<(CompiledModel, SampleInfo)> {
        let exact = self.exact;
        let tunable = spec.kernel.is_shift_invariant() && !spec.from_data() && multiples.len() > 1;
        if !tunable {
            return self.distil(spec, grid, None, obs);
        }
        let (xv, yv) = self.rows_where(|i| row_part(i) == Part::Choose);
        let task = exact.task();
        let k = exact.labels().len();
        let want = crate::model::label_indices(task, k, yv.view());
        let mut best: Option<(f64, CompiledModel, SampleInfo)> = None;
        let mut tried = Vec::new();
        for &m in multiples {
            let mut s = spec.clone();
            s.options.map_bandwidth = m;
            let (model, info) = self.distil(&s, grid, None, obs)?;
            let sc = model.decision(xv.view());
            let score = if task.is_classifier() {
                let got = crate::model::label_indices(task, k, sc.view());
                want.iter().zip(&got).filter(|(a, b)| a == b).count() as f64
                    / want.len().max(1) as f64
            } else {
                -(&sc - &yv).mapv(|v| v * v).mean().unwrap_or(0.0)
            };
            tried.push(json!({"multiple": m, "score": score}));
            // One-standard-error rule (common practice): leave the kernel's own bandwidth
            // (tried first) only for a gain larger than the score's sampling noise.
            let margin = match &best {
                Some((b, _, _)) if task.is_classifier() => {
                    (b * (1.0 - b) / xv.nrows().max(1) as f64).sqrt()
                }
                Some((b, _, _)) => 0.01 * b.abs(),
                None => 0.0,
            };
            if best.as_ref().is_none_or(|b| score > b.0 + margin) {
                best = Some((score, model, info));
            }
        }
        let (_, mut model, info) = best.expect("at least one multiple");
        model.fit["bandwidth_search"] = json!({
            "judged_on": "ridge-choice rows (index ≡ 4 mod 10)",
            "score": if task.is_classifier() { "label agreement" } else { "minus mean squared decision error" },
            "tried": tried,
        });
        Ok((model, info))
    }
}

pub(super) fn check_spec(exact: &ExactModel, spec: &FeatureSpec) -> Result<()> {
    let d = exact.input_dim();
    if spec.input_dim != d {
        return Err(Error::input(format!(
            "feature spec has input_dim {} but the model has {d}",
            spec.input_dim
        )));
    }
    if spec.kernel != *exact.kernel() {
        return Err(Error::input(
            "feature spec kernel differs from the model's kernel",
        ));
    }
    Ok(())
}

pub(super) fn finish_model(
    exact: &ExactModel,
    map: crate::features::FeatureMap,
    head: Array2<f64>,
    intercept: Vec<f64>,
    fit: serde_json::Value,
) -> Result<CompiledModel> {
    let mut m = CompiledModel::new(
        map,
        head,
        intercept,
        exact.task(),
        exact.labels().to_vec(),
        exact.scaling().cloned(),
    )?;
    m.fit = fit;
    m.feature_names = exact.feature_names.clone();
    m.exact_fingerprint = Some(exact.fingerprint());
    Ok(m)
}

/// Compiles an exact model. `calib` are raw inputs (the model's scaling is applied here).
/// `landmarks` (raw) replaces the calibration rows as the Nyström landmark pool.
pub fn compile_exact(
    exact: &ExactModel,
    calib: Option<ArrayView2<f64>>,
    spec: &FeatureSpec,
    kind: HeadKind,
    grid: &RidgeGrid,
    landmarks: Option<ArrayView2<f64>>,
    obs: &dyn Observer,
) -> Result<(CompiledModel, SampleInfo)> {
    check_spec(exact, spec)?;
    match kind {
        HeadKind::Project => {
            let calib_s = calib.map(|c| exact.scale_inputs(c));
            let pool = landmark_pool(exact, landmarks, calib_s.as_ref().map(|c| c.view()), spec);
            let pool_view = pool
                .as_ref()
                .map(|p| p.view())
                .or(calib_s.as_ref().map(|c| c.view()));
            let (map, info) = spec.sample(pool_view)?;
            let (h, b) = project(exact, &map);
            finish_model(exact, map, h, b, json!({"head": "project"})).map(|m| (m, info))
        }
        HeadKind::Distill => {
            let x = calib
                .ok_or_else(|| Error::input("distillation needs calibration data (--calib)"))?;
            // Fail before the teacher's pass when the statistics cannot fit.
            let p = spec.features as u64;
            crate::limits::check_alloc(
                4 * p * p,
                8,
                &format!("the distillation statistics for {p} features (4·D² values)"),
            )?;
            let t = Teacher::new(exact, x, obs)?;
            t.distil(spec, grid, landmarks, obs)
        }
    }
}

/// Distils `exact` on the raw calibration rows `calib` as `kernelpress compile` does:
/// with `search_bandwidth`, a random map of a shift-invariant kernel is tried at the
/// [`BANDWIDTH_MULTIPLES`] of the kernel's bandwidth ([`Teacher::distil_tuned`]);
/// otherwise (or for landmark maps, or with user `landmarks`) one distillation.
pub fn compile_exact_tuned(
    exact: &ExactModel,
    calib: ArrayView2<f64>,
    spec: &FeatureSpec,
    grid: &RidgeGrid,
    search_bandwidth: bool,
    landmarks: Option<ArrayView2<f64>>,
    obs: &dyn Observer,
) -> Result<(CompiledModel, SampleInfo)> {
    let tune = search_bandwidth
        && landmarks.is_none()
        && spec.kernel.is_shift_invariant()
        && !spec.from_data();
    if !tune {
        return compile_exact(
            exact,
            Some(calib),
            spec,
            HeadKind::Distill,
            grid,
            landmarks,
            obs,
        );
    }
    check_spec(exact, spec)?;
    check_statistics_memory(spec.features)?;
    let teacher = Teacher::new(exact, calib, obs)?;
    teacher.distil_tuned(spec, grid, &BANDWIDTH_MULTIPLES, obs)
}

/// The audit rows of a calibration set (every tenth row, [`audit_row`]) and their indices.
pub fn audit_rows(x: ArrayView2<f64>) -> (Array2<f64>, Vec<usize>) {
    let idx: Vec<usize> = (0..x.nrows()).filter(|&i| audit_row(i)).collect();
    (x.select(Axis(0), &idx), idx)
}

pub(super) fn with_kind(fit: &HeadFit, kind: &str) -> serde_json::Value {
    let mut j = fit.to_json();
    j["head"] = json!(kind);
    j
}

/// Fits a random-feature model directly to labels (no teacher): `x` raw inputs, `y` labels
/// or values, `classify` for ±1 one-vs-rest targets. With `standardize`, the inputs are
/// standardised and the scaling stored.
pub fn compile_labels(
    spec: &FeatureSpec,
    x: ArrayView2<f64>,
    y: &[String],
    classify: bool,
    standardize: bool,
    grid: &RidgeGrid,
    obs: &dyn Observer,
) -> Result<(CompiledModel, SampleInfo)> {
    let (t, task, labels) = targets(y, classify)?;
    let scaling = if standardize {
        Some(Standardizer::fit(x))
    } else {
        None
    };
    let xs: Array2<f64> = match &scaling {
        Some(s) => s.apply(x),
        None => x.to_owned(),
    };
    let (map, info) = spec.sample(Some(xs.view()))?;
    let n = xs.nrows();
    let p = map.output_dim() as u64;
    crate::limits::check_alloc(
        4 * p * p,
        8,
        &format!("the fitting statistics for {p} features (4·D² values)"),
    )?;
    let mut dist = Distiller::new(map.output_dim(), t.ncols());
    let chunks = n.div_ceil(FIT_CHUNK);
    obs.stage("fitting", chunks as u64 + 1);
    for c in 0..chunks {
        let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
        let z = map.transform(xs.slice(s![r.clone(), ..]));
        dist.add(z.view(), t.slice(s![r, ..]), row_part);
        obs.advance(1);
    }
    let fit = dist.solve(grid)?;
    obs.finish();
    let j = with_kind(&fit, "labels");
    let mut m = CompiledModel::new(map, fit.head, fit.intercept, task, labels, scaling)?;
    m.fit = j;
    Ok((m, info))
}

/// Fits the compiled model's class probabilities (Platt sigmoids, [`Probabilities`]) on
/// the calibration rows that are not audit rows, against their true labels `y`: its own
/// decision values there were fitted to the teacher's decisions, never to these labels, so
/// they are held out for the sigmoids (Platt 1999 asks for decisions not fitted on the
/// sigmoid's targets). Rows whose label is not one of the model's are left out. Returns
/// the number of rows used. Audit rows stay untouched, so the report can judge the
/// probabilities on them.
///
/// [`Probabilities`]: crate::model::Probabilities
pub fn fit_probabilities(
    model: &mut CompiledModel,
    calib: ArrayView2<f64>,
    y: &[String],
) -> Result<usize> {
    let labels = model.labels().to_vec();
    let (rows, idx): (Vec<usize>, Vec<usize>) = (0..calib.nrows())
        .filter(|&i| !audit_row(i))
        .filter_map(|i| labels.iter().position(|l| *l == y[i]).map(|c| (i, c)))
        .unzip();
    if rows.is_empty() {
        return Err(Error::input(
            "probabilities: no calibration row outside the audit rows has one of the model's labels",
        ));
    }
    let s = model.decision(calib.select(Axis(0), &rows).view());
    let p = crate::model::Probabilities::fit(model.rule(), s.view(), &idx)?;
    model.probabilities = Some((
        p,
        format!(
            "{} labelled calibration rows (the audit rows, every tenth, left out)",
            rows.len()
        ),
    ));
    Ok(rows.len())
}

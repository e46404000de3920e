//! Fitting the linear head of a compiled model.
//!
//! - [`project`]: no data: the exact model's dual expansion pushed through the feature map,
//!   `W = Z(SV)ᵀ · coef`, `b` = the exact intercepts.
//! - [`Distiller`]: ridge regression from features to the teacher's decision values (all
//!   outputs at once). Sufficient statistics (`ZᵀZ`, `Zᵀy`, sums) are accumulated chunk by
//!   chunk, separately for a training and a held-out part, so memory does not grow with the
//!   number of rows; the ridge strength is chosen by held-out mean squared error, computed
//!   from the statistics alone; the final head is refit on both parts. Rows marked
//!   [`Part::Skip`] enter neither (compiles keep every tenth calibration row out: the audit
//!   rows their figures are computed on, [`row_part`]).
//! - The `labels` fit is the same solver with ±1 (one-vs-rest) or numeric targets.
//!
//! ```
//! use kernelpress::fit::{Distiller, Part, RidgeGrid};
//! use ndarray::array;
//! // Targets that are exactly linear in the features are recovered.
//! let z = array![[1.0, 0.0], [0.0, 1.0], [1.0, 1.0], [2.0, 1.0], [1.0, 3.0], [0.5, 0.5]];
//! let y = z.dot(&array![[2.0], [-1.0]]) + 0.5;
//! let mut d = Distiller::new(2, 1);
//! d.add(z.view(), y.view(), |i| if i % 3 == 0 { Part::Choose } else { Part::Fit });
//! let fit = d.solve(&RidgeGrid::fixed(1e-10)).unwrap();
//! assert!((fit.head[[0, 0]] - 2.0).abs() < 1e-6 && (fit.intercept[0] - 0.5).abs() < 1e-6);
//! ```

mod compile;
mod factor;
mod guard;
mod head_precision;
mod refine;
mod refine_rows;
pub mod shard;

pub use factor::{FactorSummary, HeadRank};
pub use guard::guard_on_audit_rows;
pub use head_precision::{HeadPrecisionRule, HeadPrecisionSummary, PrecisionTrial};
pub use refine::{refine_sharded, RefineOptions, RefineSummary};
pub use refine_rows::{
    add_gradients, AuditTally, RefineGradient, RefineRows, RefineSource, RefineState,
};

pub use compile::{
    audit_row, audit_rows, check_statistics_memory, compile_exact, compile_exact_tuned,
    compile_labels, fit_probabilities, row_part, HeadKind, Teacher, BANDWIDTH_MULTIPLES, FIT_CHUNK,
};

use crate::features::FeatureMap;
use crate::linalg;
use crate::model::ExactModel;
use crate::{Error, Result};
use ndarray::{Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde_json::{json, Value};

/// `W = Z(SV)ᵀ · coef` and the exact intercepts: the head that reproduces the dual
/// expansion when `⟨z(x), z(sv)⟩ = k(x, sv)`.
pub fn project(exact: &ExactModel, map: &FeatureMap) -> (Array2<f64>, Vec<f64>) {
    let zsv = map.transform(exact.support_vectors());
    let head = linalg::ab(zsv.t().as_standard_layout().view(), exact.coef());
    (head, exact.intercept().to_vec())
}

/// `aᵀ·b` for tall `a`, `b`, deterministic and parallel over column blocks of the output.
fn atb(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    let (p, q) = (a.ncols(), b.ncols());
    let mut out = Array2::<f64>::zeros((p, q));
    let width = 128;
    let at = a.t().as_standard_layout().into_owned();
    out.axis_chunks_iter_mut(Axis(1), width)
        .into_par_iter()
        .enumerate()
        .for_each(|(ci, mut dst)| {
            let c0 = ci * width;
            let cols = dst.ncols();
            let bb = b
                .slice(ndarray::s![.., c0..c0 + cols])
                .as_standard_layout()
                .into_owned();
            dst.assign(&linalg::ab_seq(at.view(), bb.view()));
        });
    out
}

#[derive(Debug, Clone)]
struct Stats {
    n: usize,
    zz: Array2<f64>,
    zy: Array2<f64>,
    sz: Array1<f64>,
    sy: Array1<f64>,
    yy: Array1<f64>,
}

impl Stats {
    fn new(p: usize, k: usize) -> Self {
        Stats {
            n: 0,
            zz: Array2::zeros((p, p)),
            zy: Array2::zeros((p, k)),
            sz: Array1::zeros(p),
            sy: Array1::zeros(k),
            yy: Array1::zeros(k),
        }
    }
    fn add(&mut self, z: ArrayView2<f64>, y: ArrayView2<f64>) {
        if z.nrows() == 0 {
            return;
        }
        self.n += z.nrows();
        self.zz += &atb(z, z);
        self.zy += &atb(z, y);
        self.sz += &z.sum_axis(Axis(0));
        self.sy += &y.sum_axis(Axis(0));
        self.yy += &y.mapv(|v| v * v).sum_axis(Axis(0));
    }
    fn merged(&self, o: &Stats) -> Stats {
        Stats {
            n: self.n + o.n,
            zz: &self.zz + &o.zz,
            zy: &self.zy + &o.zy,
            sz: &self.sz + &o.sz,
            sy: &self.sy + &o.sy,
            yy: &self.yy + &o.yy,
        }
    }
}

/// Candidate ridge strengths, relative to `trace(ZᵀZ_centred)/(n·D)` (the mean feature
/// variance), so the grid means the same at every feature count.
#[derive(Debug, Clone)]
pub struct RidgeGrid {
    /// Relative strengths tried (held-out choice when more than one).
    pub relative: Vec<f64>,
}

impl RidgeGrid {
    /// The default grid: 1e-7 … 1e-1 relative.
    pub fn standard() -> Self {
        RidgeGrid {
            relative: vec![1e-7, 1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1],
        }
    }
    /// One fixed relative strength, unchecked (see [`RidgeGrid::try_fixed`] for a value a
    /// user gave).
    pub fn fixed(rel: f64) -> Self {
        RidgeGrid {
            relative: vec![rel],
        }
    }

    /// One fixed relative strength given by a user: in (0, 1e6], relative to the mean
    /// feature variance.
    ///
    /// ```
    /// use kernelpress::fit::RidgeGrid;
    /// assert!(RidgeGrid::try_fixed(1e-4).is_ok());
    /// assert!(RidgeGrid::try_fixed(-1.0).is_err() && RidgeGrid::try_fixed(f64::NAN).is_err());
    /// ```
    pub fn try_fixed(rel: f64) -> crate::Result<Self> {
        RidgeGrid::try_relative(vec![rel])
    }

    /// A grid of relative strengths given by a user: at least one, each in (0, 1e6].
    pub fn try_relative(relative: Vec<f64>) -> crate::Result<Self> {
        if relative.is_empty() {
            return Err(crate::Error::input(
                "a ridge grid needs at least one strength",
            ));
        }
        if let Some(r) = relative.iter().find(|&&r| !(r > 0.0 && r <= 1e6)) {
            return Err(crate::Error::input(format!(
                "ridge strength {r} must be in (0, 1e6]: it is relative to the mean feature variance"
            )));
        }
        Ok(RidgeGrid { relative })
    }
}

/// A fitted head.
#[derive(Debug, Clone)]
pub struct HeadFit {
    /// `D × k` weights.
    pub head: Array2<f64>,
    /// `k` intercepts.
    pub intercept: Vec<f64>,
    /// Chosen absolute ridge strength.
    pub ridge: f64,
    /// Chosen relative strength.
    pub ridge_relative: f64,
    /// Held-out MSE per candidate (empty when there was no held-out part).
    pub holdout_mse: Vec<(f64, f64)>,
    /// What the solver had to do (jitter added on ill-conditioning, …).
    pub notes: Vec<String>,
    /// Rows used for training / held out.
    pub rows: (usize, usize),
}

impl HeadFit {
    /// Fit settings as JSON for manifests.
    pub fn to_json(&self) -> Value {
        json!({
            "ridge": self.ridge,
            "ridge_relative": self.ridge_relative,
            "holdout_mse": self.holdout_mse.iter().map(|(r, m)| json!([r, m])).collect::<Vec<_>>(),
            "rows_train": self.rows.0,
            "rows_holdout": self.rows.1,
            "notes": self.notes,
        })
    }
}

/// What a row given to [`Distiller::add`] is used for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Part {
    /// Fitting the head.
    Fit,
    /// Choosing the ridge strength (then the final refit).
    Choose,
    /// Nothing: kept out of the fit for an honest evaluation.
    Skip,
}

/// Streams `(features, targets)` chunks into sufficient statistics and solves the ridge
/// problem with the held-out choice of strength.
#[derive(Debug, Clone)]
pub struct Distiller {
    train: Stats,
    hold: Stats,
    seen: usize,
}

impl Distiller {
    /// For `p` features and `k` targets.
    pub fn new(p: usize, k: usize) -> Self {
        Distiller {
            train: Stats::new(p, k),
            hold: Stats::new(p, k),
            seen: 0,
        }
    }

    /// Adds a chunk; `part(i)` says what global row `i` is for: fitting, choosing the
    /// ridge strength, or nothing (rows kept for an honest evaluation).
    pub fn add(&mut self, z: ArrayView2<f64>, y: ArrayView2<f64>, part: impl Fn(usize) -> Part) {
        self.add_at(self.seen, z, y, part)
    }

    /// Adds a chunk whose first row has global index `first` (a shard of a larger set:
    /// `part` is asked about global indices, so any split of the rows gives the same parts).
    pub fn add_at(
        &mut self,
        first: usize,
        z: ArrayView2<f64>,
        y: ArrayView2<f64>,
        part: impl Fn(usize) -> Part,
    ) {
        assert_eq!(z.nrows(), y.nrows(), "distill: rows differ");
        let of = |want: Part| -> Vec<usize> {
            (0..z.nrows())
                .filter(|&i| part(first + i) == want)
                .collect()
        };
        let (idx_t, idx_h) = (of(Part::Fit), of(Part::Choose));
        self.train.add(
            z.select(Axis(0), &idx_t).view(),
            y.select(Axis(0), &idx_t).view(),
        );
        self.hold.add(
            z.select(Axis(0), &idx_h).view(),
            y.select(Axis(0), &idx_h).view(),
        );
        self.seen += z.nrows();
    }

    /// Feature and target counts `(D, k)`.
    pub fn shape(&self) -> (usize, usize) {
        (self.train.zz.nrows(), self.train.zy.ncols())
    }

    /// Rows in the fitting and the ridge-choice parts.
    pub fn rows(&self) -> (usize, usize) {
        (self.train.n, self.hold.n)
    }

    /// Adds the statistics of `other` (the same features and targets, other rows): the
    /// sums are over rows, so merging in any order gives the same statistics up to
    /// rounding.
    ///
    /// # Panics
    /// If the shapes differ.
    #[track_caller]
    pub fn merge(&mut self, other: &Distiller) {
        assert_eq!(self.shape(), other.shape(), "distill: merged shapes differ");
        self.train = self.train.merged(&other.train);
        self.hold = self.hold.merged(&other.hold);
        self.seen += other.seen;
    }

    /// Writes the statistics as tensors `{prefix}{part}.{zz,zy,sz,sy,yy}` (parts `fit` and
    /// `choose`) and returns the row counts for the manifest.
    pub fn write(&self, f: &mut crate::format::TensorFile, prefix: &str) -> Value {
        for (name, s) in [("fit", &self.train), ("choose", &self.hold)] {
            let (p, k) = (s.zz.nrows(), s.zy.ncols());
            let t = |field: &str| format!("{prefix}{name}.{field}");
            f.put_f64(&t("zz"), vec![p, p], s.zz.iter().copied().collect());
            f.put_f64(&t("zy"), vec![p, k], s.zy.iter().copied().collect());
            f.put_f64(&t("sz"), vec![p], s.sz.to_vec());
            f.put_f64(&t("sy"), vec![k], s.sy.to_vec());
            f.put_f64(&t("yy"), vec![k], s.yy.to_vec());
        }
        json!({"fit": self.train.n, "choose": self.hold.n})
    }

    /// Reads statistics written by [`Distiller::write`] for `p` features and `k` targets;
    /// `rows` is the manifest value it returned.
    pub fn read(
        f: &crate::format::TensorFile,
        prefix: &str,
        p: usize,
        k: usize,
        rows: &Value,
        src: &str,
    ) -> Result<Distiller> {
        let mut d = Distiller::new(p, k);
        let mut seen = 0;
        for (name, s) in [("fit", &mut d.train), ("choose", &mut d.hold)] {
            let t = |field: &str| format!("{prefix}{name}.{field}");
            let n = rows.get(name).and_then(|v| v.as_u64()).ok_or_else(|| {
                Error::file(format!(
                    "{src}: manifest field 'rows.{name}' is missing or not a whole number"
                ))
            })?;
            s.n = usize::try_from(n)
                .map_err(|_| Error::file(format!("{src}: rows.{name} {n} is too large")))?;
            seen += s.n;
            s.zz = Array2::from_shape_vec((p, p), f.f64(&t("zz"), &[Some(p), Some(p)], src)?)
                .expect("shape checked");
            s.zy = Array2::from_shape_vec((p, k), f.f64(&t("zy"), &[Some(p), Some(k)], src)?)
                .expect("shape checked");
            s.sz = Array1::from(f.f64(&t("sz"), &[Some(p)], src)?);
            s.sy = Array1::from(f.f64(&t("sy"), &[Some(k)], src)?);
            s.yy = Array1::from(f.f64(&t("yy"), &[Some(k)], src)?);
            let finite = |v: &f64| v.is_finite();
            if !(s.zz.iter().all(finite)
                && s.zy.iter().all(finite)
                && [&s.sz, &s.sy, &s.yy].iter().all(|a| a.iter().all(finite)))
            {
                return Err(Error::file(format!(
                    "{src}: statistics '{prefix}{name}.*' hold a value that is not finite"
                )));
            }
        }
        d.seen = seen;
        Ok(d)
    }

    fn centred(s: &Stats) -> (Array2<f64>, Array2<f64>, Array1<f64>, Array1<f64>) {
        let n = s.n.max(1) as f64;
        let mz = &s.sz / n;
        let my = &s.sy / n;
        let mut a = s.zz.clone();
        let mzc = mz.view().insert_axis(Axis(1));
        a -= &(mzc.dot(&mzc.t()) * n);
        let myr = my.view().insert_axis(Axis(0));
        let b = &s.zy - &(mzc.dot(&myr) * n);
        (a, b, mz, my)
    }

    fn solve_one(
        a: &Array2<f64>,
        b: &Array2<f64>,
        lam: f64,
        notes: &mut Vec<String>,
    ) -> Result<(Array2<f64>, f64)> {
        let p = a.nrows();
        // Centred statistics with a zero trace: every feature is constant over the rows
        // (identical calibration rows, say). No ridge makes that a fit; say what is wrong.
        let trace: f64 = (0..p).map(|i| a[[i, i]]).sum();
        if !(trace > 0.0) {
            return Err(Error::input(
                "the calibration rows do not vary: every feature is constant over the rows that fit the head (are the rows identical?); give calibration rows that cover the inputs the model will see",
            ));
        }
        let mut lam = lam;
        for attempt in 0..8 {
            let mut m = a.clone();
            for i in 0..p {
                m[[i, i]] += lam;
            }
            match linalg::cholesky_solve(m.view(), b.view(), "distillation") {
                Ok(w) => return Ok((w, lam)),
                Err(_) => {
                    let next = if lam > 0.0 { lam * 10.0 } else { 1e-12 };
                    notes.push(format!(
                        "ridge system not positive definite at λ = {lam:.3e}; retried with λ = {next:.3e} (attempt {})",
                        attempt + 1
                    ));
                    lam = next;
                }
            }
        }
        Err(Error::numerical(
            "distillation: the ridge system stayed singular after 8 increases of λ: the calibration rows vary too little for this many features; give more varied rows or fewer features",
        ))
    }

    fn mse(s: &Stats, w: &Array2<f64>, b: &Array1<f64>) -> f64 {
        // Σ‖zW + b − y‖² from the statistics: tr(WᵀZᵀZW) + 2bᵀWᵀΣz + n‖b‖² − 2tr(WᵀZᵀY) − 2bᵀΣy + Σ‖y‖².
        let n = s.n as f64;
        let zzw = s.zz.dot(w);
        let t1: f64 = (w * &zzw).sum();
        let t2: f64 = 2.0 * b.dot(&w.t().dot(&s.sz));
        let t3: f64 = n * b.dot(b);
        let t4: f64 = 2.0 * (w * &s.zy).sum();
        let t5: f64 = 2.0 * b.dot(&s.sy);
        let t6: f64 = s.yy.sum();
        (t1 + t2 + t3 - t4 - t5 + t6) / (n * w.ncols() as f64)
    }

    /// Chooses the strength on the held-out part (if any) and refits on all rows.
    pub fn solve(&self, grid: &RidgeGrid) -> Result<HeadFit> {
        if self.train.n == 0 {
            return Err(Error::input("no rows to fit the head on"));
        }
        let mut notes = Vec::new();
        let (a, b, mz_t, my_t) = Self::centred(&self.train);
        let p = a.nrows();
        let scale =
            (a.diag().sum() / (self.train.n as f64 * p as f64)).max(1e-300) * self.train.n as f64;
        let mut holdout = Vec::new();
        let mut best = (grid.relative[0], f64::INFINITY);
        if grid.relative.len() > 1 && self.hold.n > 0 {
            for &rel in &grid.relative {
                let (w, _) = Self::solve_one(&a, &b, rel * scale, &mut notes)?;
                let bias = &my_t - &w.t().dot(&mz_t);
                let e = Self::mse(&self.hold, &w, &bias);
                holdout.push((rel, e));
                if e < best.1 {
                    best = (rel, e);
                }
            }
        }
        let all = self.train.merged(&self.hold);
        let (a, b, mz, my) = Self::centred(&all);
        let scale_all = (a.diag().sum() / (all.n as f64 * p as f64)).max(1e-300) * all.n as f64;
        let (w, lam) = Self::solve_one(&a, &b, best.0 * scale_all, &mut notes)?;
        let bias = &my - &w.t().dot(&mz);
        Ok(HeadFit {
            head: w,
            intercept: bias.to_vec(),
            ridge: lam,
            ridge_relative: lam / scale_all,
            holdout_mse: holdout,
            notes,
            rows: (self.train.n, self.hold.n),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn exact_least_squares_on_many_rows() {
        let z = Array2::from_shape_fn((400, 4), |(i, j)| {
            ((i * 4 + j) as f64 * 0.31 + (i * j) as f64 * 0.07).cos() * 2.0
        });
        let w = Array2::from_shape_fn((4, 2), |(i, j)| i as f64 - j as f64 * 0.5);
        let y = z.dot(&w) + 0.3;
        let mut d = Distiller::new(4, 2);
        d.add(z.view(), y.view(), |i| {
            if i % 5 == 4 {
                Part::Choose
            } else {
                Part::Fit
            }
        });
        let fit = d.solve(&RidgeGrid::fixed(1e-12)).unwrap();
        for (a, b) in fit.head.iter().zip(w.iter()) {
            assert!((a - b).abs() < 1e-8, "{a} vs {b}");
        }
        let fit = d.solve(&RidgeGrid::standard()).unwrap();
        assert_eq!(fit.holdout_mse.len(), 7);
        assert!(fit.ridge_relative <= 1e-6, "{}", fit.ridge_relative);
    }
}

//! A factored head for models with many outputs: a one-vs-one model over K classes has
//! K(K−1)/2 decision values, and its `D × outputs` head then costs more than the feature
//! map. The head's fitted values on the calibration rows mostly lie in a few directions, so
//! the head is replaced by the reduced-rank one `W·V_r·V_rᵀ` (Izenman 1975, "Reduced-rank
//! regression for the multivariate linear model"; `V_r` the `r` leading eigenvectors of
//! the centred fitted values' `ŶᵀŶ` on the head-fitting rows, which by Eckart & Young 1936
//! is the best rank-`r` approximation of those fitted values). It runs as a trailing dense
//! step `D → r` (`(W·V_r)ᵀ`) and an `r × outputs` head: `D·r + r·outputs` weights instead
//! of `D·outputs`. The rank is the smallest of a ladder whose label agreement with the
//! teacher on the ridge-choice rows is within a tolerance of the full head's there; the
//! audit rows are never read.

use super::compile::{row_part, Teacher};
use super::Part;
use crate::features::FeatureMap;
use crate::model::{label_indices, CompiledModel};
use crate::program::{steps, Builder, ValueId};
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, Axis};
use serde_json::json;

/// How to choose the rank of a factored head.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HeadRank {
    /// This rank.
    Fixed(usize),
    /// The smallest rank whose label agreement with the teacher on the ridge-choice rows
    /// is at most `tolerance` below the full head's (regression: whose mean squared error
    /// there is at most `1 + tolerance` times the full head's).
    Auto {
        /// Agreement given up at most (e.g. 0.002).
        tolerance: f64,
    },
}

impl HeadRank {
    /// The rank rule, or what is wrong with it.
    pub fn checked(self) -> Result<HeadRank> {
        match self {
            HeadRank::Fixed(0) => Err(Error::input("a head rank must be at least 1")),
            HeadRank::Auto { tolerance } if !(0.0..=1.0).contains(&tolerance) => Err(Error::input(
                format!("head rank tolerance {tolerance}: expected 0 to 1"),
            )),
            r => Ok(r),
        }
    }
}

/// What factoring did.
#[derive(Debug, Clone, PartialEq)]
pub struct FactorSummary {
    /// The rank kept (`None`: no rank saves weights or meets the tolerance; the model is
    /// unchanged).
    pub rank: Option<usize>,
    /// Weights of the head before, and of the dense step plus head after.
    pub weights: (usize, usize),
    /// Ridge-choice rows' agreement (regression: minus the mean squared error) of the full
    /// head and of each rank tried.
    pub full: f64,
    /// `(rank, figure)` for each rank tried.
    pub tried: Vec<(usize, f64)>,
}

impl FactorSummary {
    /// The summary as stored in the model's fit record.
    pub fn to_json(&self) -> serde_json::Value {
        json!({
            "rank": self.rank,
            "weights_before": self.weights.0,
            "weights_after": self.weights.1,
            "choose_figure_full": self.full,
            "tried": self.tried.iter().map(|(r, f)| json!([r, f])).collect::<Vec<_>>(),
            "judged_on": "calibration ridge-choice rows (every tenth row, index ≡ 4 mod 10)",
        })
    }
}

impl Teacher<'_> {
    /// Replaces `model`'s head by a factored one (see the module documentation), the rank
    /// chosen by `rank`. A model whose head is already folded into a projection, or with a
    /// single output, is refused; when no rank saves weights (or, with
    /// [`HeadRank::Auto`], none meets the tolerance) the model comes back unchanged but
    /// for its fit record (`factored_head` with `rank: null` and the ranks tried).
    pub fn factor_head(
        &self,
        model: &CompiledModel,
        rank: HeadRank,
    ) -> Result<(CompiledModel, FactorSummary)> {
        let rank = rank.checked()?;
        if model.is_folded() {
            return Err(Error::input(
                "the head is already folded into the map's last projection (Nyström); a factored head would add weights",
            ));
        }
        let (d, k) = model.head().dim();
        if k < 2 {
            return Err(Error::input(
                "a factored head needs a model with several outputs; this one has one",
            ));
        }
        if model.program().input_dim() != self.scaled().ncols() {
            return Err(Error::input("the model does not take the teacher's inputs"));
        }
        let x = self.scaled();
        let y = self.decisions();
        let n = x.nrows();
        let of = |want: Part| -> Vec<usize> { (0..n).filter(|&i| row_part(i) == want).collect() };
        let (fit_rows, choose_rows) = (of(Part::Fit), of(Part::Choose));
        if fit_rows.is_empty() || choose_rows.is_empty() {
            return Err(Error::input(
                "a factored head needs head-fitting and ridge-choice calibration rows",
            ));
        }
        // Fitted values without the intercept, on the fitting rows (for the directions)
        // and on the ridge-choice rows (to judge the ranks).
        let fitted = |rows: &[usize]| -> Array2<f64> {
            let xr = x.select(Axis(0), rows);
            let z = crate::linalg::map_row_chunks(xr.view(), d, |c| model.program().apply_chunk(c));
            crate::linalg::ab(z.view(), model.head())
        };
        let yf = fitted(&fit_rows);
        let mean = yf.mean_axis(Axis(0)).expect("rows");
        let yc = &yf - &mean.view().insert_axis(Axis(0));
        let cov = crate::linalg::ata(yc.view());
        let (vals, vecs) = crate::linalg::eigh(cov.view())?;
        // Leading directions first (eigh gives ascending eigenvalues).
        let order: Vec<usize> = (0..vals.len()).rev().collect();
        let v = vecs.select(Axis(1), &order);
        let ych = fitted(&choose_rows);
        let truth = y.select(Axis(0), &choose_rows);
        let icpt = ndarray::Array1::from(model.intercept().to_vec());
        let task = model.task();
        let labels = model.labels().len();
        let want = task
            .is_classifier()
            .then(|| label_indices(task, labels, truth.view()));
        let judge = |dec: ArrayView2<f64>| -> f64 {
            let dec = &dec + &icpt.view().insert_axis(Axis(0));
            match &want {
                Some(w) => {
                    let got = label_indices(task, labels, dec.view());
                    got.iter().zip(w).filter(|(a, b)| a == b).count() as f64 / w.len() as f64
                }
                None => -(&dec - &truth).mapv(|e| e * e).mean().unwrap_or(0.0),
            }
        };
        let full = judge(ych.view());
        let saves = |r: usize| d * r + r * k < d * k;
        let ladder: Vec<usize> = match rank {
            HeadRank::Fixed(r) => vec![r.min(k)],
            HeadRank::Auto { .. } => {
                let mut l = Vec::new();
                let mut r = 2usize;
                while r < k && saves(r) {
                    l.push(r);
                    r = if r < 8 { r * 2 } else { r + r / 2 };
                }
                l
            }
        };
        let mut tried = Vec::new();
        let mut chosen = None;
        for &r in &ladder {
            let vr = v.slice(s![.., ..r]);
            let proj = crate::linalg::ab(crate::linalg::ab(ych.view(), vr).view(), vr.t());
            let f = judge(proj.view());
            tried.push((r, f));
            let ok = match rank {
                HeadRank::Fixed(_) => saves(r),
                HeadRank::Auto { tolerance } => {
                    if want.is_some() {
                        f >= full - tolerance
                    } else {
                        -f <= -full * (1.0 + tolerance)
                    }
                }
            };
            if ok {
                chosen = Some(r);
                break;
            }
        }
        let before = d * k;
        let Some(r) = chosen else {
            let summary = FactorSummary {
                rank: None,
                weights: (before, before),
                full,
                tried,
            };
            let mut m = model.clone();
            m.fit["factored_head"] = summary.to_json();
            return Ok((m, summary));
        };
        let vr = v.slice(s![.., ..r]).to_owned();
        let wv = crate::linalg::ab(model.head(), vr.view());
        let mut b = Builder::new(model.program().input_dim());
        for ins in model.program().instrs() {
            b.push(ins.step.clone(), &ins.inputs)?;
        }
        let out: ValueId = model.program().output();
        let dense = b.push(
            steps::Dense::new(wv.t().as_standard_layout().into_owned())?,
            &[out],
        )?;
        let program = b.finish(dense);
        let map = FeatureMap {
            spec: model.spec().clone(),
            program,
        };
        let mut m = CompiledModel::new(
            map,
            vr.t().as_standard_layout().into_owned(),
            model.intercept().to_vec(),
            task,
            model.labels().to_vec(),
            model.scaling().cloned(),
        )?;
        let summary = FactorSummary {
            rank: Some(r),
            weights: (before, d * r + r * k),
            full,
            tried,
        };
        m.fit = model.fit.clone();
        m.fit["factored_head"] = summary.to_json();
        m.feature_names = model.feature_names.clone();
        m.exact_fingerprint = model.exact_fingerprint.clone();
        m.probabilities = model.probabilities.clone();
        Ok((m, summary))
    }
}

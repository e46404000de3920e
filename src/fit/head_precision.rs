//! Choosing the precision of a compiled model's head products on the f32 paths
//! ([`HeadPrecision`]): each precision is tried on the calibration's ridge-choice rows
//! (labels, or for regression the squared error, against the teacher's) and timed on a
//! single row; the smallest whose figure is within a tolerance of the f32 head's is kept
//! (int8, then bfloat16, then f32: chosen by size rather than by the timing, so the same
//! inputs give the same model file on every run). The audit rows are never read, so the
//! report's figures on them stay honest.

use super::compile::{row_part, Teacher};
use super::Part;
use crate::linalg::HeadPrecision;
use crate::model::{label_indices, CompiledModel};
use crate::{Error, Result};
use ndarray::{Array2, Axis};
use serde_json::json;

/// How to set a compiled model's head precision.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HeadPrecisionRule {
    /// This precision.
    Fixed(HeadPrecision),
    /// The smallest precision (int8, then bfloat16, then f32) whose label agreement with the
    /// teacher on the ridge-choice rows is at most `tolerance` below the f32 head's there
    /// (regression: whose mean squared error is at most `1 + tolerance` times the f32
    /// head's).
    Smallest {
        /// Agreement given up at most (e.g. 0.002).
        tolerance: f64,
    },
}

impl HeadPrecisionRule {
    /// The rule, or what is wrong with it.
    pub fn checked(self) -> Result<HeadPrecisionRule> {
        match self {
            HeadPrecisionRule::Smallest { tolerance } if !(0.0..=1.0).contains(&tolerance) => {
                Err(Error::input(format!(
                    "head precision tolerance {tolerance}: expected 0 to 1"
                )))
            }
            r => Ok(r),
        }
    }
}

/// One precision tried.
#[derive(Debug, Clone, PartialEq)]
pub struct PrecisionTrial {
    /// The precision.
    pub precision: HeadPrecision,
    /// The instruction-set path its products took.
    pub path: &'static str,
    /// Ridge-choice rows' label agreement with the teacher (regression: minus the mean
    /// squared error).
    pub figure: f64,
    /// Single-row f32 latency, the fastest of a few passes over up to 256 rows (µs).
    pub latency_us: f64,
}

/// What choosing the head precision did.
#[derive(Debug, Clone, PartialEq)]
pub struct HeadPrecisionSummary {
    /// The precision kept.
    pub chosen: HeadPrecision,
    /// Every precision tried, f32 first.
    pub tried: Vec<PrecisionTrial>,
}

impl HeadPrecisionSummary {
    /// The summary as stored in the model's fit record (`head_precision`).
    pub fn to_json(&self) -> serde_json::Value {
        json!({
            "chosen": self.chosen.name(),
            // Latencies and paths are not stored: they vary from run to run and from machine
            // to machine, and the file must not.
            "tried": self.tried.iter().map(|t| json!({
                "precision": t.precision.name(),
                "choose_figure": t.figure,
            })).collect::<Vec<_>>(),
            "judged_on": "calibration ridge-choice rows (every tenth row, index ≡ 4 mod 10)",
        })
    }
}

impl Teacher<'_> {
    /// `model` with its head precision set by `rule` (see the module documentation); the
    /// trials are recorded in its fit record as `head_precision`.
    pub fn set_head_precision(
        &self,
        model: &CompiledModel,
        rule: HeadPrecisionRule,
    ) -> Result<(CompiledModel, HeadPrecisionSummary)> {
        let rule = rule.checked()?;
        if model.input_dim() != self.raw().ncols() {
            return Err(Error::input("the model does not take the teacher's inputs"));
        }
        let n = self.raw().nrows();
        let choose: Vec<usize> = (0..n).filter(|&i| row_part(i) == Part::Choose).collect();
        if choose.is_empty() {
            return Err(Error::input(
                "choosing a head precision needs ridge-choice calibration rows",
            ));
        }
        let x = self.raw().select(Axis(0), &choose);
        let truth = self.decisions().select(Axis(0), &choose);
        let task = model.task();
        let labels = model.labels().len();
        let want = task
            .is_classifier()
            .then(|| label_indices(task, labels, truth.view()));
        let judge = |dec: &Array2<f64>| -> f64 {
            match &want {
                Some(w) => {
                    let got = label_indices(task, labels, dec.view());
                    got.iter().zip(w).filter(|(a, b)| a == b).count() as f64 / w.len() as f64
                }
                None => -(dec - &truth).mapv(|e| e * e).mean().unwrap_or(0.0),
            }
        };
        let candidates: Vec<HeadPrecision> = match rule {
            HeadPrecisionRule::Fixed(p) => vec![HeadPrecision::F32, p],
            HeadPrecisionRule::Smallest { .. } => HeadPrecision::ALL.to_vec(),
        };
        let mut tried: Vec<PrecisionTrial> = Vec::new();
        for p in candidates {
            if tried.iter().any(|t| t.precision == p) {
                continue;
            }
            let mut m = model.clone();
            m.set_head_precision(p);
            let figure = judge(&m.decision_f32(x.view()));
            tried.push(PrecisionTrial {
                precision: p,
                path: p.path_name(),
                figure,
                latency_us: single_row_us(&m, x.view()),
            });
        }
        let full = tried[0].figure;
        let chosen = match rule {
            HeadPrecisionRule::Fixed(p) => p,
            HeadPrecisionRule::Smallest { tolerance } => tried
                .iter()
                .rev()
                .find(|t| {
                    if want.is_some() {
                        t.figure >= full - tolerance
                    } else {
                        -t.figure <= -full * (1.0 + tolerance)
                    }
                })
                .map(|t| t.precision)
                .unwrap_or(HeadPrecision::F32),
        };
        let summary = HeadPrecisionSummary { chosen, tried };
        let mut m = model.clone();
        m.set_head_precision(chosen);
        m.fit["head_precision"] = summary.to_json();
        Ok((m, summary))
    }
}

/// The model's f32 single-row latency: the fastest of five passes over up to 256 rows
/// (µs per row).
fn single_row_us(m: &CompiledModel, x: ndarray::ArrayView2<f64>) -> f64 {
    let rows = x.nrows().min(256);
    let mut scratch = vec![0f32; m.scratch_len()];
    let mut out = vec![0.0; m.n_outputs()];
    let owned: Vec<Vec<f64>> = (0..rows).map(|i| x.row(i).to_vec()).collect();
    let mut best = f64::INFINITY;
    for _ in 0..5 {
        let t = std::time::Instant::now();
        for r in &owned {
            m.decision_one_f32_with(r, &mut scratch, &mut out);
            std::hint::black_box(&out);
        }
        best = best.min(t.elapsed().as_secs_f64() * 1e6 / rows.max(1) as f64);
    }
    best
}

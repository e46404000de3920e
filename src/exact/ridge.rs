//! Kernel ridge regression: `(K + λI) α = Y − ȳ`, intercept `ȳ`, solved by Cholesky.
//! Classification is one-vs-rest least squares on ±1 targets (one column for two classes,
//! positive for the second label).

use super::{class_labels, encode};
use crate::data::Standardizer;
use crate::kernel::Kernel;
use crate::linalg;
use crate::model::{ExactModel, Task};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use serde_json::json;

/// Options for [`fit_ridge`].
#[derive(Debug, Clone)]
pub struct RidgeOptions {
    /// Ridge strength λ > 0 added to the Gram matrix's diagonal.
    pub ridge: f64,
    /// Treat the targets as class labels (one-vs-rest least squares).
    pub classify: bool,
}

/// Fits kernel ridge regression on `x` (already scaled) with string targets `y`.
pub fn fit_ridge(
    kernel: &Kernel,
    x: ArrayView2<f64>,
    y: &[String],
    opts: &RidgeOptions,
) -> Result<ExactModel> {
    fit_ridge_scaled(kernel, x, y, opts, None, &crate::observe::Silent)
}

pub(crate) fn targets(y: &[String], classify: bool) -> Result<(Array2<f64>, Task, Vec<String>)> {
    let n = y.len();
    if classify {
        let labels = class_labels(y);
        if labels.len() < 2 {
            return Err(Error::input(format!(
                "classification needs at least 2 classes; the target has {}",
                labels.len()
            )));
        }
        let idx = encode(y, &labels)?;
        if labels.len() == 2 {
            let t = Array2::from_shape_fn((n, 1), |(i, _)| if idx[i] == 1 { 1.0 } else { -1.0 });
            Ok((t, Task::Binary, labels))
        } else {
            let k = labels.len();
            let t = Array2::from_shape_fn((n, k), |(i, c)| if idx[i] == c { 1.0 } else { -1.0 });
            Ok((t, Task::Ovr, labels))
        }
    } else {
        let mut v = Vec::with_capacity(n);
        for (i, s) in y.iter().enumerate() {
            match s.trim().parse::<f64>() {
                Ok(f) if f.is_finite() => v.push(f),
                _ => {
                    return Err(Error::input(format!(
                        "row {}, target: expected a finite number for regression, found '{s}'",
                        i + 1
                    )))
                }
            }
        }
        Ok((
            Array2::from_shape_vec((n, 1), v).unwrap(),
            Task::Regression,
            vec![],
        ))
    }
}

/// As [`fit_ridge`], recording `scaling` (already applied to `x`) in the model and reporting
/// progress and notes to `obs`.
pub fn fit_ridge_scaled(
    kernel: &Kernel,
    x: ArrayView2<f64>,
    y: &[String],
    opts: &RidgeOptions,
    scaling: Option<Standardizer>,
    obs: &dyn crate::observe::Observer,
) -> Result<ExactModel> {
    if !(opts.ridge > 0.0) || !opts.ridge.is_finite() {
        return Err(Error::input(format!(
            "--ridge {} is invalid; expected a positive finite number",
            opts.ridge
        )));
    }
    if x.nrows() != y.len() {
        return Err(Error::input(
            "number of targets differs from number of rows",
        ));
    }
    kernel.check_dim(x.ncols())?;
    if !kernel.is_positive_definite() {
        obs.note(&format!(
            "kernel {kernel} is not positive definite; the ridge system may be indefinite"
        ));
    }
    let (t, task, labels) = targets(y, opts.classify)?;
    let n = x.nrows();
    let mean: Vec<f64> = t
        .columns()
        .into_iter()
        .map(|c| c.sum() / n as f64)
        .collect();
    let mut tc = t.clone();
    for mut row in tc.rows_mut() {
        for (v, m) in row.iter_mut().zip(&mean) {
            *v -= m;
        }
    }
    obs.stage("kernel ridge", 3);
    let mut g = kernel.gram(x, x);
    obs.advance(1);
    for i in 0..n {
        g[[i, i]] += opts.ridge;
    }
    let alpha = linalg::cholesky_solve(g.view(), tc.view(), "kernel ridge (K + λI)")?;
    obs.advance(2);
    obs.finish();
    let mut m = ExactModel::new(
        kernel.clone(),
        x.to_owned(),
        alpha,
        mean,
        task,
        labels,
        scaling,
    )?;
    m.training = json!({ "model": "ridge", "ridge": opts.ridge, "n_train": n });
    Ok(m)
}

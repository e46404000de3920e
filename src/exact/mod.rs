//! Exact teachers: kernel ridge regression and C-SVM by SMO.
//!
//! ```
//! use kernelpress::exact::{fit_ridge, RidgeOptions};
//! use ndarray::array;
//! let x = array![[-1.0], [0.0], [1.0]];
//! let y = vec!["-2.0".to_string(), "0.0".into(), "2.0".into()];
//! let m = fit_ridge(&"linear()".parse().unwrap(), x.view(), &y, &RidgeOptions { ridge: 1e-9, classify: false }).unwrap();
//! let s = m.decision(array![[3.0]].view());
//! assert!((s[[0, 0]] - 6.0).abs() < 1e-6);
//! ```

pub mod choose;
pub(crate) mod ridge;
mod smo;

pub use ridge::{fit_ridge, fit_ridge_scaled, RidgeOptions};
pub use smo::{fit_svm, solve_binary, SmoOptions, SmoSolution};

use crate::{Error, Result};

/// Sorted distinct labels (numeric order when all labels are numbers, else text order).
pub fn class_labels(y: &[String]) -> Vec<String> {
    let mut v: Vec<String> = y.to_vec();
    v.sort();
    v.dedup();
    if v.iter().all(|s| s.parse::<f64>().is_ok()) {
        v.sort_by(|a, b| {
            a.parse::<f64>()
                .unwrap()
                .total_cmp(&b.parse::<f64>().unwrap())
        });
    }
    v
}

/// Label index of each row.
pub fn encode(y: &[String], labels: &[String]) -> Result<Vec<usize>> {
    y.iter()
        .enumerate()
        .map(|(i, s)| {
            labels.iter().position(|l| l == s).ok_or_else(|| {
                Error::input(format!("row {}: label '{s}' is not a known class", i + 1))
            })
        })
        .collect()
}

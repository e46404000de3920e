//! Data files: CSV with a header row, `.npy` arrays, atomic writes, input scaling.
//!
//! ```
//! use kernelpress::data::{read_csv_str, Standardizer};
//! let t = read_csv_str("x1,x2,kind\n1,2,a\n3,4,b\n", "demo.csv", Some("kind")).unwrap();
//! assert_eq!(t.x.dim(), (2, 2));
//! assert_eq!(t.target.as_deref().unwrap(), &["a".to_string(), "b".to_string()]);
//! let s = Standardizer::fit(t.x.view());
//! assert_eq!(s.mean, vec![2.0, 3.0]);
//! ```

mod csv;
mod idx;
mod npy;

pub use crate::fsio::{read_bytes, write_atomic};
pub use csv::{read_csv, read_csv_str, write_csv};
pub use idx::{read_idx_images, read_idx_labels};
pub use npy::{parse_npy, read_npy, write_npy_f32, write_npy_f64, NpyArray};

use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use std::path::Path;

/// A data set read from a file: features, their names, and the target column if asked for.
#[derive(Debug, Clone)]
pub struct Table {
    /// Features, `n × d`.
    pub x: Array2<f64>,
    /// Feature names (CSV header, or `x0 … x{d-1}` for `.npy`).
    pub columns: Vec<String>,
    /// The target column's raw values, when a target was named and present.
    pub target: Option<Vec<String>>,
    /// Where the data came from (for messages).
    pub source: String,
}

impl Table {
    /// The target as numbers (regression), with an error naming the row on a bad value.
    pub fn numeric_target(&self) -> Result<Vec<f64>> {
        let t = self
            .target
            .as_ref()
            .ok_or_else(|| Error::input(format!("{}: no target column", self.source)))?;
        t.iter()
            .enumerate()
            .map(|(i, s)| match s.trim().parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(v),
                _ => Err(Error::input(format!(
                    "{}: row {}, target: expected a finite number, found '{s}'",
                    self.source,
                    i + 1
                ))),
            })
            .collect()
    }
}

/// Reads a CSV (header row) or `.npy` (2-D float array) data file. `target` names the
/// CSV column holding labels; with `require_target` a missing column is an error, otherwise
/// a named but absent column is ignored (as `score` does).
pub fn read_table(path: &Path, target: Option<&str>, require_target: bool) -> Result<Table> {
    let is_npy = path
        .extension()
        .map(|e| e.eq_ignore_ascii_case("npy"))
        .unwrap_or(false);
    if is_npy {
        if target.is_some() && require_target {
            return Err(Error::input(format!(
                "{}: a .npy data file holds features only; put the target in a CSV column",
                path.display()
            )));
        }
        let a = read_npy(path)?;
        let x = a.into_2d(&path.display().to_string())?;
        let columns = (0..x.ncols()).map(|j| format!("x{j}")).collect();
        return Ok(Table {
            x,
            columns,
            target: None,
            source: path.display().to_string(),
        });
    }
    let t = read_csv(path, target, require_target)?;
    if require_target && t.target.is_none() {
        return Err(Error::input(format!(
            "{}: target column '{}' not found; columns are {}",
            path.display(),
            target.unwrap_or(""),
            t.columns.join(", ")
        )));
    }
    Ok(t)
}

/// Per-feature standardisation `(x − mean) / scale`, stored in model files.
#[derive(Debug, Clone, PartialEq)]
pub struct Standardizer {
    /// Per-feature mean.
    pub mean: Vec<f64>,
    /// Per-feature scale (standard deviation; 1 where the feature is constant).
    pub scale: Vec<f64>,
}

impl Standardizer {
    /// Fits mean and standard deviation (population) of each column.
    pub fn fit(x: ArrayView2<f64>) -> Standardizer {
        let n = x.nrows().max(1) as f64;
        let mut mean = vec![0.0; x.ncols()];
        let mut scale = vec![0.0; x.ncols()];
        for (j, col) in x.columns().into_iter().enumerate() {
            let m = col.sum() / n;
            let v = col.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / n;
            mean[j] = m;
            scale[j] = if v.sqrt() > 1e-12 * (1.0 + m.abs()) {
                v.sqrt()
            } else {
                1.0
            };
        }
        Standardizer { mean, scale }
    }

    /// Applies the scaling to a batch.
    pub fn apply(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let mut out = x.to_owned();
        for mut row in out.rows_mut() {
            for (j, v) in row.iter_mut().enumerate() {
                *v = (*v - self.mean[j]) / self.scale[j];
            }
        }
        out
    }
}

/// Checks that a batch has `d` features and only finite values.
pub fn check_batch(x: ArrayView2<f64>, d: usize, source: &str) -> Result<()> {
    if x.ncols() != d {
        return Err(Error::input(format!(
            "{source}: the data have {} features but the model expects {d}",
            x.ncols()
        )));
    }
    for (i, row) in x.rows().into_iter().enumerate() {
        if let Some(j) = row.iter().position(|v| !v.is_finite()) {
            return Err(Error::input(format!(
                "{source}: row {}, feature {}: value {} is not finite",
                i + 1,
                j,
                row[j]
            )));
        }
    }
    Ok(())
}

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
mod stream;

pub use crate::fsio::{check_writable, read_bytes, write_all_atomic, write_atomic};
pub use csv::{csv_field, csv_text, read_csv, read_csv_str, write_csv};
pub use idx::{read_idx_images, read_idx_labels};
pub use npy::{
    dtype_message, not_finite_message, parse_npy, read_npy, shape_message, write_npy_f32,
    write_npy_f64, NpyArray,
};
pub use stream::{Chunk, RowFile};

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
    if is_npy(path) {
        if target.is_some() && require_target {
            return Err(Error::input(format!(
                "{}: a .npy data file holds features only; put the target in a CSV column",
                path.display()
            )));
        }
        let a = read_npy(path)?;
        let x = a.into_2d(&path.display().to_string())?;
        let columns = placeholder_names(x.ncols());
        return Ok(Table {
            x,
            columns,
            target: None,
            source: path.display().to_string(),
        });
    }
    let t = read_csv(path, target, require_target)?;
    if require_target && t.target.is_none() {
        let t_name = target.unwrap_or("");
        let cols: Vec<&str> = t.columns.iter().map(|x| x.as_str()).collect();
        return Err(Error::input(format!(
            "{}: target column '{t_name}' not found{}; columns are {}",
            path.display(),
            crate::error::did_you_mean(t_name, &cols),
            list_names(cols.iter().copied())
        )));
    }
    Ok(t)
}

/// True for a `.npy` path (by extension, any case).
pub(crate) fn is_npy(path: &Path) -> bool {
    path.extension()
        .map(|e| e.eq_ignore_ascii_case("npy"))
        .unwrap_or(false)
}

/// Up to twelve names, quoted, then how many more (so that a file with a million columns
/// gives a one-line message).
pub fn list_names<'a>(names: impl Iterator<Item = &'a str>) -> String {
    let all: Vec<&str> = names.collect();
    let mut s: Vec<String> = all.iter().take(12).map(|m| format!("'{m}'")).collect();
    if all.len() > 12 {
        s.push(format!("… ({} more)", all.len() - 12));
    }
    s.join(", ")
}

/// Largest magnitude accepted in data (squares and products of such values stay finite).
pub const MAX_ABS_VALUE: f64 = 1e150;

/// Data read for a model: its rows with the model's features in the model's order.
#[derive(Debug, Clone)]
pub struct Matched {
    /// The rows (features in model order) and the target column if named.
    pub table: Table,
    /// What the matching did (columns ignored, position used), for the user.
    pub notes: Vec<String>,
}

/// The placeholder column names `x0 … x{d−1}` of data or a model that has no names.
pub fn placeholder_names(d: usize) -> Vec<String> {
    (0..d).map(|j| format!("x{j}")).collect()
}

/// True when `names` are the placeholder names (a model given no column names: imported
/// from arrays or ONNX).
pub fn has_placeholder_names(names: &[String]) -> bool {
    names == placeholder_names(names.len()).as_slice()
}

/// Reads a data file for a model with feature names `names`. A CSV header is matched to
/// the names, in any order: extra columns are ignored (with a note), missing ones are an
/// error naming them. `.npy` files, models without names, and `by_position` take the
/// columns in file order instead (the target column, when named, is left out).
pub fn read_for_model(
    path: &Path,
    target: Option<&str>,
    names: &[String],
    by_position: bool,
) -> Result<Matched> {
    let src = path.display().to_string();
    let mut notes = Vec::new();
    if is_npy(path) {
        let t = read_table(path, None, false)?;
        check_batch(t.x.view(), names.len(), &src)?;
        return Ok(Matched { table: t, notes });
    }
    let text = csv::read_text(path)?;
    let header = csv::header(&text, &src)?;
    let select = plan_columns(&header, target, names, by_position, &src, &mut notes)?;
    let t = csv::read_csv_select(&text, &src, target, select.as_deref(), names)?;
    check_batch(t.x.view(), names.len(), &src)?;
    Ok(Matched { table: t, notes })
}

/// Which CSV columns are a model's features: by name (any order; missing ones are an
/// error naming them, extra ones a note), or by position for `by_position` and models
/// without names. `None` means every column but the target, in file order.
pub(crate) fn plan_columns(
    header: &[String],
    target: Option<&str>,
    names: &[String],
    by_position: bool,
    src: &str,
    notes: &mut Vec<String>,
) -> Result<Option<Vec<String>>> {
    if let Some(t) = target {
        if !header.iter().any(|h| h == t) {
            let cols: Vec<&str> = header.iter().map(|h| h.as_str()).collect();
            return Err(Error::input(format!(
                "{src}: target column '{t}' not found{}; the columns are {} (leave out --target when the file has no target column)",
                crate::error::did_you_mean(t, &cols),
                list_names(cols.iter().copied()),
            )));
        }
    }
    let others: Vec<&String> = header
        .iter()
        .filter(|h| Some(h.as_str()) != target)
        .collect();
    let known = !has_placeholder_names(names);
    let select: Option<Vec<String>> = if by_position {
        None
    } else if known {
        let missing: Vec<&String> = names.iter().filter(|n| !header.contains(n)).collect();
        if !missing.is_empty() {
            let hint = match target {
                Some(t) if missing.iter().any(|m| *m == t) => {
                    format!(" ('{t}' was given as --target)")
                }
                _ => String::new(),
            };
            return Err(Error::input(format!(
                "{src}: the model's feature column{} {} {} missing{hint}; the file has {}",
                if missing.len() == 1 { "" } else { "s" },
                list_names(missing.iter().map(|x| x.as_str())),
                if missing.len() == 1 { "is" } else { "are" },
                list_names(others.iter().map(|x| x.as_str())),
            )));
        }
        let extra: Vec<&&String> = others.iter().filter(|h| !names.contains(h)).collect();
        if !extra.is_empty() {
            notes.push(format!(
                "{src}: ignored column{} {} (not features of the model{})",
                if extra.len() == 1 { "" } else { "s" },
                list_names(extra.iter().map(|x| x.as_str())),
                if target.is_none() {
                    "; name a label column with --target"
                } else {
                    ""
                }
            ));
        }
        Some(names.to_vec())
    } else {
        if others.len() == names.len() && others.iter().zip(names).any(|(a, b)| *a != b) {
            notes.push(format!(
                "{src}: the model has no column names; columns are taken by position"
            ));
        }
        None
    };
    Ok(select)
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
            return Err(Error::input(npy::not_finite_message(source, i, j, row[j])));
        }
        if let Some(j) = row.iter().position(|v| v.abs() > MAX_ABS_VALUE) {
            return Err(Error::input(format!(
                "{source}: row {}, feature {}: value {:e} is too large (at most {MAX_ABS_VALUE:e} in magnitude, so that squared distances and products stay finite)",
                i + 1,
                j,
                row[j]
            )));
        }
    }
    Ok(())
}

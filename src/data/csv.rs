//! CSV with a header row. Fields are separated by commas; surrounding whitespace and
//! double quotes are stripped. Every feature cell must be a finite number.

use super::Table;
use crate::{Error, Result};
use ndarray::Array2;
use std::path::Path;

fn split(line: &str) -> Vec<String> {
    line.split(',')
        .map(|f| {
            let f = f.trim();
            f.strip_prefix('"')
                .and_then(|g| g.strip_suffix('"'))
                .unwrap_or(f)
                .to_string()
        })
        .collect()
}

/// Reads a CSV file; see [`read_csv_str`].
pub fn read_csv(path: &Path, target: Option<&str>, require_target: bool) -> Result<Table> {
    let bytes = super::read_bytes(path)?;
    let text = String::from_utf8(bytes).map_err(|e| {
        Error::input(format!(
            "{}: not UTF-8 text (byte {}); expected a CSV file",
            path.display(),
            e.utf8_error().valid_up_to()
        ))
    })?;
    let src = path.display().to_string();
    if require_target {
        if let Some(t) = target {
            let head = text.lines().find(|l| !l.trim().is_empty()).unwrap_or("");
            let names = split(head.trim_start_matches('\u{feff}'));
            if !head.is_empty() && !names.iter().any(|n| n == t) {
                return Err(Error::input(format!(
                    "{src}: target column '{t}' not found; columns are {}",
                    names.join(", ")
                )));
            }
        }
    }
    read_csv_str(&text, &src, target)
}

/// Parses CSV text. `source` names it in errors; `target` is the label column, if any
/// (absent columns give `target: None`).
pub fn read_csv_str(text: &str, source: &str, target: Option<&str>) -> Result<Table> {
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty());
    let (_, header) = lines.next().ok_or_else(|| {
        Error::input(format!(
            "{source}: file is empty; expected a header row and data rows"
        ))
    })?;
    let names = split(header.trim_start_matches('\u{feff}'));
    let tcol = target.and_then(|t| names.iter().position(|n| n == t));
    let columns: Vec<String> = names
        .iter()
        .enumerate()
        .filter(|(j, _)| Some(*j) != tcol)
        .map(|(_, n)| n.clone())
        .collect();
    if columns.is_empty() {
        return Err(Error::input(format!("{source}: no feature columns")));
    }
    let d = columns.len();
    let mut vals = Vec::new();
    let mut tvals = Vec::new();
    let mut n = 0usize;
    for (li, line) in lines {
        let fields = split(line);
        if fields.len() != names.len() {
            return Err(Error::input(format!(
                "{source}: row {} (line {}) has {} fields; the header has {}",
                n + 1,
                li + 1,
                fields.len(),
                names.len()
            )));
        }
        for (j, f) in fields.into_iter().enumerate() {
            if Some(j) == tcol {
                tvals.push(f);
                continue;
            }
            let v: f64 = f.parse().map_err(|_| {
                Error::input(format!(
                    "{source}: row {} (line {}), column '{}': expected a number, found '{f}'",
                    n + 1,
                    li + 1,
                    names[j]
                ))
            })?;
            if !v.is_finite() {
                return Err(Error::input(format!(
                    "{source}: row {} (line {}), column '{}': expected a finite number, found '{f}'",
                    n + 1,
                    li + 1,
                    names[j]
                )));
            }
            vals.push(v);
        }
        n += 1;
    }
    if n == 0 {
        return Err(Error::input(format!(
            "{source}: has a header but no data rows"
        )));
    }
    let x = Array2::from_shape_vec((n, d), vals).expect("row lengths checked");
    Ok(Table {
        x,
        columns,
        target: tcol.map(|_| tvals),
        source: source.to_string(),
    })
}

/// Writes a CSV (header + rows of already formatted fields) atomically.
pub fn write_csv(path: &Path, header: &[String], rows: &[Vec<String>]) -> Result<()> {
    let mut s = String::with_capacity(rows.len() * 16 * header.len().max(1));
    s.push_str(&header.join(","));
    s.push('\n');
    for r in rows {
        s.push_str(&r.join(","));
        s.push('\n');
    }
    super::write_atomic(path, s.as_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn errors_name_row_and_column() {
        let e = read_csv_str("a,b\n1,2\n3,x\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("row 2"), "{e}");
        assert!(e.to_string().contains("column 'b'"), "{e}");
        let e = read_csv_str("a,b\n1,nan\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("finite"), "{e}");
        let e = read_csv_str("a,b\n1\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("1 fields"), "{e}");
        assert!(read_csv_str("", "f.csv", None)
            .unwrap_err()
            .to_string()
            .contains("empty"));
        assert!(read_csv_str("a,b\n", "f.csv", None)
            .unwrap_err()
            .to_string()
            .contains("no data"));
    }

    #[test]
    fn target_is_split_off() {
        let t = read_csv_str("y,a\n\"cat\",1.5\ndog,-2e3\n", "f.csv", Some("y")).unwrap();
        assert_eq!(t.columns, vec!["a"]);
        assert_eq!(t.x[[1, 0]], -2000.0);
        assert_eq!(t.target.unwrap(), vec!["cat", "dog"]);
    }
}

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
            let names = header(&text, &src)?;
            if !names.iter().any(|n| n == t) {
                let cols: Vec<&str> = names.iter().map(|x| x.as_str()).collect();
                return Err(Error::input(format!(
                    "{src}: target column '{t}' not found{}; columns are {}",
                    crate::error::did_you_mean(t, &cols),
                    super::list_names(cols.iter().copied())
                )));
            }
        }
    }
    read_csv_str(&text, &src, target)
}

/// Reads a CSV file as text, with an error naming it when it is not UTF-8.
pub(crate) fn read_text(path: &Path) -> Result<String> {
    let bytes = super::read_bytes(path)?;
    String::from_utf8(bytes).map_err(|e| {
        Error::input(format!(
            "{}: not UTF-8 text (byte {}); expected a CSV file",
            path.display(),
            e.utf8_error().valid_up_to()
        ))
    })
}

/// Parses CSV text. `source` names it in errors; `target` is the label column, if any
/// (absent columns give `target: None`).
pub fn read_csv_str(text: &str, source: &str, target: Option<&str>) -> Result<Table> {
    read_csv_select(text, source, target, None, &[])
}

/// Checks a header: no empty and no repeated names.
pub(crate) fn check_header(names: &[String], source: &str) -> Result<()> {
    if let Some(j) = names.iter().position(|n| n.is_empty()) {
        return Err(Error::input(format!(
            "{source}: header column {} has no name; every column needs one",
            j + 1
        )));
    }
    let mut seen = std::collections::HashMap::new();
    for (j, n) in names.iter().enumerate() {
        if let Some(first) = seen.insert(n.as_str(), j) {
            return Err(Error::input(format!(
                "{source}: column name '{n}' appears twice (columns {} and {})",
                first + 1,
                j + 1
            )));
        }
    }
    Ok(())
}

/// Text with every line ending (`\r\n`, or a lone `\r` as old Mac files have) made `\n`.
pub(crate) fn normalise_newlines(text: &str) -> std::borrow::Cow<'_, str> {
    if text.contains('\r') {
        std::borrow::Cow::Owned(text.replace("\r\n", "\n").replace('\r', "\n"))
    } else {
        std::borrow::Cow::Borrowed(text)
    }
}

/// The header of CSV text (after a byte-order mark), checked.
pub(crate) fn header(text_in: &str, source: &str) -> Result<Vec<String>> {
    let text = &normalise_newlines(text_in);
    let head = text.lines().find(|l| !l.trim().is_empty()).ok_or_else(|| {
        Error::input(format!(
            "{source}: file is empty; expected a header row and data rows"
        ))
    })?;
    let names = split(head.trim_start_matches('\u{feff}'));
    check_header(&names, source)?;
    Ok(names)
}

/// Parses CSV text keeping the columns `select` (by name, in that order) as features, or
/// every column but the target when `select` is `None`. `model_names` (may be empty) are
/// used to explain a non-numeric column that is not a model feature.
pub(crate) fn read_csv_select(
    text_in: &str,
    source: &str,
    target: Option<&str>,
    select: Option<&[String]>,
    model_names: &[String],
) -> Result<Table> {
    let text = &normalise_newlines(text_in);
    let names = header(text, source)?;
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty());
    lines.next();
    let p = RowParser::new(names, source, target, select, model_names)?;
    let mut vals = Vec::new();
    let mut tvals = Vec::new();
    let mut n = 0usize;
    for (li, line) in lines {
        p.parse(line, n, li, &mut vals, &mut tvals)?;
        n += 1;
    }
    if n == 0 {
        return Err(p.no_rows());
    }
    Ok(Table {
        x: Array2::from_shape_vec((n, p.width()), vals).expect("row lengths checked"),
        columns: p.columns(),
        target: p.tcol.map(|_| tvals),
        source: source.to_string(),
    })
}

/// Parses data lines of one CSV layout: which fields are features (in output order) and
/// which is the target. Shared by the whole-file reader and the chunked one
/// ([`super::RowFile`]), so both give the same checks and messages.
#[derive(Debug, Clone)]
pub(crate) struct RowParser {
    names: Vec<String>,
    cols: Vec<usize>,
    slot: Vec<usize>,
    tcol: Option<usize>,
    source: String,
    target_given: bool,
    model_names: Vec<String>,
}

impl RowParser {
    /// A parser for a file whose header is `names`.
    pub(crate) fn new(
        names: Vec<String>,
        source: &str,
        target: Option<&str>,
        select: Option<&[String]>,
        model_names: &[String],
    ) -> Result<RowParser> {
        let tcol = target.and_then(|t| names.iter().position(|n| n == t));
        // Feature column indices in output order.
        let cols: Vec<usize> = match select {
            Some(sel) => sel
                .iter()
                .map(|s| {
                    names
                        .iter()
                        .position(|n| n == s)
                        .expect("selected columns exist")
                })
                .collect(),
            None => (0..names.len()).filter(|j| Some(*j) != tcol).collect(),
        };
        if cols.is_empty() {
            return Err(Error::input(format!("{source}: no feature columns")));
        }
        let mut slot = vec![usize::MAX; names.len()];
        for (k, j) in cols.iter().enumerate() {
            slot[*j] = k;
        }
        Ok(RowParser {
            names,
            cols,
            slot,
            tcol,
            source: source.to_string(),
            target_given: target.is_some(),
            model_names: model_names.to_vec(),
        })
    }

    /// Feature count.
    pub(crate) fn width(&self) -> usize {
        self.cols.len()
    }

    /// True when the target column is present.
    pub(crate) fn has_target(&self) -> bool {
        self.tcol.is_some()
    }

    /// Feature names in output order.
    pub(crate) fn columns(&self) -> Vec<String> {
        self.cols.iter().map(|j| self.names[*j].clone()).collect()
    }

    /// The error for a file without data rows.
    pub(crate) fn no_rows(&self) -> Error {
        Error::input(format!("{}: has a header but no data rows", self.source))
    }

    /// Parses data row `n` (0-based), found on line `li` (0-based), appending its features
    /// to `vals` and its target to `tvals`.
    pub(crate) fn parse(
        &self,
        line: &str,
        n: usize,
        li: usize,
        vals: &mut Vec<f64>,
        tvals: &mut Vec<String>,
    ) -> Result<()> {
        let source = &self.source;
        let names = &self.names;
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
        let at = vals.len();
        vals.resize(at + self.cols.len(), 0.0);
        for (j, f) in fields.into_iter().enumerate() {
            if Some(j) == self.tcol {
                tvals.push(f);
                continue;
            }
            if self.slot[j] == usize::MAX {
                continue;
            }
            let v: f64 = f.parse().map_err(|_| {
                let mut m = format!(
                    "{source}: row {} (line {}), column '{}': expected a number, found '{f}'",
                    n + 1,
                    li + 1,
                    names[j]
                );
                if !self.model_names.is_empty() && !self.model_names.contains(&names[j]) {
                    m.push_str(&format!(
                        "; '{}' is not one of the model's features — if it holds the labels, pass --target {}",
                        names[j], names[j]
                    ));
                } else if self.model_names.is_empty() && !self.target_given {
                    m.push_str(&format!(
                        "; if the column holds labels, pass --target {}",
                        names[j]
                    ));
                }
                Error::input(m)
            })?;
            if !v.is_finite() {
                return Err(Error::input(format!(
                    "{source}: row {} (line {}), column '{}': expected a finite number, found '{f}'",
                    n + 1,
                    li + 1,
                    names[j]
                )));
            }
            vals[at + self.slot[j]] = v;
        }
        Ok(())
    }
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
        let e = read_csv_str("a,a\n1,2\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("appears twice"), "{e}");
        let e = read_csv_str("a,,c\n1,2,3\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("column 2 has no name"), "{e}");
        let e = read_csv_str("a,b\n1,x\n", "f.csv", None).unwrap_err();
        assert!(e.to_string().contains("pass --target b"), "{e}");
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

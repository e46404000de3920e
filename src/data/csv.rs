//! CSV with a header row, read and written by RFC 4180: fields separated by commas, a field
//! in double quotes may hold commas, line breaks and doubled quotes; surrounding
//! whitespace is not part of a field. Every feature cell must be a finite number.

use super::Table;
use crate::{Error, Result};
use ndarray::Array2;
use std::path::Path;

/// Splits one record into fields by RFC 4180: fields separated by commas, a field may be
/// enclosed in double quotes, inside which commas, line breaks and doubled quotes (`""`
/// for one `"`) are data. Whitespace around a field is not part of it (a leniency: data
/// files often pad). `None` when a quoted field is still open at the end: the record
/// continues on the next line.
pub(crate) fn split_record(rec: &str) -> Option<Vec<String>> {
    let mut out = Vec::new();
    let mut chars = rec.chars().peekable();
    loop {
        while chars.peek().is_some_and(|c| *c == ' ' || *c == '\t') {
            chars.next();
        }
        let mut f = String::new();
        if chars.peek() == Some(&'"') {
            chars.next();
            loop {
                match chars.next() {
                    None => return None,
                    Some('"') if chars.peek() == Some(&'"') => {
                        chars.next();
                        f.push('"');
                    }
                    Some('"') => break,
                    Some(c) => f.push(c),
                }
            }
            // Anything between the closing quote and the comma is kept, as text.
            let mut rest = String::new();
            while let Some(&c) = chars.peek() {
                if c == ',' {
                    break;
                }
                rest.push(c);
                chars.next();
            }
            f.push_str(rest.trim());
        } else {
            while let Some(&c) = chars.peek() {
                if c == ',' {
                    break;
                }
                f.push(c);
                chars.next();
            }
            f = f.trim().to_string();
        }
        out.push(f);
        match chars.next() {
            Some(',') => continue,
            _ => return Some(out),
        }
    }
}

/// Splits a record that is known to be complete (a header line falls back to a plain
/// split when a quote is left open, so that the error names the columns).
fn split(line: &str) -> Vec<String> {
    split_record(line).unwrap_or_else(|| line.split(',').map(|f| f.trim().to_string()).collect())
}

/// One CSV field as RFC 4180 writes it: enclosed in double quotes (and inner quotes
/// doubled) when it holds a comma, a quote, a line break or surrounding spaces.
///
/// ```
/// use kernelpress::data::csv_field;
/// assert_eq!(csv_field("ok"), "ok");
/// assert_eq!(csv_field("a,b"), "\"a,b\"");
/// assert_eq!(csv_field("say \"hi\""), "\"say \"\"hi\"\"\"");
/// ```
pub fn csv_field(s: &str) -> std::borrow::Cow<'_, str> {
    if s.contains([',', '"', '\n', '\r']) || s.starts_with(' ') || s.ends_with(' ') {
        std::borrow::Cow::Owned(format!("\"{}\"", s.replace('"', "\"\"")))
    } else {
        std::borrow::Cow::Borrowed(s)
    }
}

/// CSV text of a header and rows, each field written by [`csv_field`].
pub fn csv_text(header: &[String], rows: &[Vec<String>]) -> String {
    let mut s = String::with_capacity(rows.len() * 16 * header.len().max(1));
    let line = |s: &mut String, r: &[String]| {
        for (j, f) in r.iter().enumerate() {
            if j > 0 {
                s.push(',');
            }
            s.push_str(&csv_field(f));
        }
        s.push('\n');
    };
    line(&mut s, header);
    for r in rows {
        line(&mut s, r);
    }
    s
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
    // Each column name costs a string and a table slot (about 64 bytes with its text):
    // checked against the memory ceiling before a header of a million columns is split.
    let columns = head.matches(',').count() as u64 + 1;
    crate::limits::check_alloc(
        columns,
        64 + (head.len() as u64 / columns),
        "the header's column names",
    )
    .map_err(|e| e.context(source))?;
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
    let mut lines = text.lines().enumerate();
    // Skip to the header line (the first non-blank one).
    for (_, l) in lines.by_ref() {
        if !l.trim().is_empty() {
            break;
        }
    }
    let p = RowParser::new(names, source, target, select, model_names)?;
    let mut vals = Vec::new();
    let mut tvals = Vec::new();
    let mut n = 0usize;
    let mut pending: Option<(usize, String)> = None;
    for (li, line) in lines {
        let (start, rec) = match pending.take() {
            Some((st, mut r)) => {
                r.push('\n');
                r.push_str(line);
                (st, r)
            }
            None if line.trim().is_empty() => continue,
            None => (li, line.to_string()),
        };
        if split_record(&rec).is_none() {
            pending = Some((start, rec));
            continue;
        }
        p.parse(&rec, n, start, &mut vals, &mut tvals)?;
        n += 1;
    }
    if let Some((start, _)) = pending {
        return Err(p.open_quote(n, start));
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

    /// The error for a record whose quoted field is never closed.
    pub(crate) fn open_quote(&self, n: usize, li: usize) -> Error {
        Error::input(format!(
            "{}: row {} (line {}): a quoted field is never closed (a '\"' is missing)",
            self.source,
            n + 1,
            li + 1
        ))
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
        let fields = split_record(line).ok_or_else(|| self.open_quote(n, li))?;
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

/// Writes a CSV (header + rows of already formatted fields) atomically, fields quoted as
/// RFC 4180 requires ([`csv_field`]).
pub fn write_csv(path: &Path, header: &[String], rows: &[Vec<String>]) -> Result<()> {
    super::write_atomic(path, csv_text(header, rows).as_bytes())
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

//! Reading a data file a chunk of rows at a time, so that a pass over calibration data
//! holds one chunk in memory however long the file is. CSV lines go through the same
//! parser as the whole-file reader (same checks, same messages, rows and lines counted
//! over the whole file); `.npy` arrays in C order are read row block by row block (a
//! Fortran-ordered array is read whole, its layout allowing nothing else).

use super::csv::{header, RowParser};
use super::npy::{not_finite_message, shape_message};
use super::{check_batch, is_npy, plan_columns};
use crate::error::io_error;
use crate::{Error, Result};
use ndarray::Array2;
use std::fs::File;
use std::io::{BufRead, BufReader, Read};
use std::path::Path;

/// One chunk of rows: the global index of its first row, the features, the target column's
/// values when one was named and present.
#[derive(Debug, Clone)]
pub struct Chunk {
    /// Global (0-based) index of the chunk's first row in the file.
    pub first_row: usize,
    /// Features, rows × d, in the model's column order.
    pub x: Array2<f64>,
    /// Target values of these rows, when a target column was named and present.
    pub target: Option<Vec<String>>,
}

enum Source {
    Csv {
        reader: BufReader<File>,
        parser: RowParser,
        line: usize,
    },
    Npy {
        reader: BufReader<File>,
        rows_left: usize,
        d: usize,
        size: usize,
        kind: char,
    },
    Whole {
        x: Array2<f64>,
        at: usize,
    },
}

/// A data file opened for chunked reading, columns matched to a model's.
///
/// ```no_run
/// use kernelpress::data::RowFile;
/// let names: Vec<String> = ["a", "b"].iter().map(|s| s.to_string()).collect();
/// let mut f = RowFile::open_for_model("calib.csv".as_ref(), None, &names, false).unwrap();
/// while let Some(chunk) = f.next_chunk(2048).unwrap() {
///     println!("rows {}..{}", chunk.first_row, chunk.first_row + chunk.x.nrows());
/// }
/// ```
pub struct RowFile {
    src: Source,
    source: String,
    rows: usize,
    width: usize,
    /// What matching the columns did (extra columns ignored, position used).
    pub notes: Vec<String>,
}

impl std::fmt::Debug for RowFile {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "RowFile({}, {} rows read)", self.source, self.rows)
    }
}

impl RowFile {
    /// Opens `path` (CSV or `.npy`) for a model with feature names `names`, matching
    /// columns as [`super::read_for_model`] does.
    pub fn open_for_model(
        path: &Path,
        target: Option<&str>,
        names: &[String],
        by_position: bool,
    ) -> Result<RowFile> {
        let source = path.display().to_string();
        if let Ok(m) = std::fs::metadata(path) {
            if !m.is_file() {
                return Err(Error::input(format!(
                    "{source}: not a regular file; expected a data file"
                )));
            }
        }
        let file = File::open(path).map_err(|e| io_error(path, "open", e))?;
        let mut reader = BufReader::with_capacity(1 << 20, file);
        let mut notes = Vec::new();
        let src = if is_npy(path) {
            open_npy(&mut reader, &source, names.len())?
                .map(|(rows_left, d, size, kind)| Source::Npy {
                    reader,
                    rows_left,
                    d,
                    size,
                    kind,
                })
                .unwrap_or_else(|| Source::Whole {
                    x: Array2::zeros((0, 0)),
                    at: 0,
                })
        } else {
            let mut line = 0;
            let head = loop {
                let Some(l) = read_line(&mut reader, &source, line)? else {
                    return Err(Error::input(format!(
                        "{source}: file is empty; expected a header row and data rows"
                    )));
                };
                line += 1;
                if !l.trim().is_empty() {
                    break l;
                }
            };
            if head.contains('\r') {
                // Old Mac line endings (a lone CR): the whole-file reader handles them.
                Source::Whole {
                    x: Array2::zeros((0, 0)),
                    at: 0,
                }
            } else {
                let cols = header(&head, &source)?;
                let select = plan_columns(&cols, target, names, by_position, &source, &mut notes)?;
                let parser = RowParser::new(cols, &source, target, select.as_deref(), names)?;
                Source::Csv {
                    reader,
                    parser,
                    line,
                }
            }
        };
        let src = match src {
            Source::Whole { .. } => {
                let m = super::read_for_model(path, target, names, by_position)?;
                notes = m.notes;
                Source::Whole {
                    x: m.table.x,
                    at: 0,
                }
            }
            other => other,
        };
        Ok(RowFile {
            src,
            source,
            rows: 0,
            width: names.len(),
            notes,
        })
    }

    /// The next chunk of at most `max_rows` rows (checked: finite, the model's width), or
    /// `None` at the end of the file. A file without data rows is an error.
    pub fn next_chunk(&mut self, max_rows: usize) -> Result<Option<Chunk>> {
        let first_row = self.rows;
        let max_rows = max_rows.max(1);
        let (x, target) = match &mut self.src {
            Source::Csv {
                reader,
                parser,
                line,
            } => {
                let mut vals = Vec::with_capacity(max_rows * parser.width());
                let mut tvals = Vec::new();
                let mut n = 0;
                while n < max_rows {
                    let Some(mut l) = read_line(reader, &self.source, *line)? else {
                        break;
                    };
                    *line += 1;
                    if l.trim().is_empty() {
                        continue;
                    }
                    let start = *line - 1;
                    // A quoted field may hold line breaks (RFC 4180): read on to its end.
                    while super::csv::split_record(&l).is_none() {
                        let Some(more) = read_line(reader, &self.source, *line)? else {
                            return Err(parser.open_quote(first_row + n, start));
                        };
                        *line += 1;
                        l.push('\n');
                        l.push_str(&more);
                    }
                    parser.parse(&l, first_row + n, start, &mut vals, &mut tvals)?;
                    n += 1;
                }
                if n == 0 && first_row == 0 {
                    return Err(parser.no_rows());
                }
                let x = Array2::from_shape_vec((n, parser.width()), vals).expect("rows checked");
                (x, parser.has_target().then_some(tvals))
            }
            Source::Npy {
                reader,
                rows_left,
                d,
                size,
                kind,
            } => {
                let n = max_rows.min(*rows_left);
                let mut buf = vec![0u8; n * *d * *size];
                reader.read_exact(&mut buf).map_err(|_| {
                    Error::input(format!(
                        "{}: not a valid .npy file: the data end before row {} (truncated or corrupted)",
                        self.source,
                        first_row + n
                    ))
                })?;
                *rows_left -= n;
                let vals: Vec<f64> = buf
                    .chunks_exact(*size)
                    .map(|c| match (*kind, *size) {
                        ('f', 8) => f64::from_le_bytes(c.try_into().unwrap()),
                        ('f', _) => f32::from_le_bytes(c.try_into().unwrap()) as f64,
                        (_, 8) => i64::from_le_bytes(c.try_into().unwrap()) as f64,
                        _ => i32::from_le_bytes(c.try_into().unwrap()) as f64,
                    })
                    .collect();
                if let Some(i) = vals.iter().position(|v| !v.is_finite()) {
                    return Err(Error::input(not_finite_message(
                        &self.source,
                        first_row + i / *d,
                        i % *d,
                        vals[i],
                    )));
                }
                (Array2::from_shape_vec((n, *d), vals).expect("sized"), None)
            }
            Source::Whole { x, at } => {
                let n = max_rows.min(x.nrows() - *at);
                let c = x.slice(ndarray::s![*at..*at + n, ..]).to_owned();
                *at += n;
                (c, None)
            }
        };
        if x.nrows() == 0 {
            return Ok(None);
        }
        check_batch(x.view(), self.width, &self.source).map_err(|e| {
            // Rows in the message count over the whole file.
            if first_row == 0 {
                e
            } else {
                renumber(e, first_row)
            }
        })?;
        self.rows += x.nrows();
        Ok(Some(Chunk {
            first_row,
            x,
            target,
        }))
    }

    /// Rows read so far.
    pub fn rows_read(&self) -> usize {
        self.rows
    }
}

/// `check_batch` counts rows from the chunk's start; shift "row N" to the file's count.
fn renumber(e: Error, first_row: usize) -> Error {
    let m = e.message();
    let Some(at) = m.find(": row ") else {
        return e;
    };
    let rest = &m[at + 6..];
    let digits: String = rest.chars().take_while(|c| c.is_ascii_digit()).collect();
    match digits.parse::<usize>() {
        Ok(r) => Error::new(
            e.kind(),
            format!(
                "{}: row {}{}",
                &m[..at],
                r + first_row,
                &rest[digits.len()..]
            ),
        ),
        Err(_) => e,
    }
}

/// One line without its `\n` / `\r\n`, as UTF-8; `None` at the end.
fn read_line(r: &mut impl BufRead, source: &str, line: usize) -> Result<Option<String>> {
    let mut buf = Vec::new();
    let n = r
        .read_until(b'\n', &mut buf)
        .map_err(|e| io_error(Path::new(source), "read", e))?;
    if n == 0 {
        return Ok(None);
    }
    if buf.last() == Some(&b'\n') {
        buf.pop();
        if buf.last() == Some(&b'\r') {
            buf.pop();
        }
    }
    String::from_utf8(buf).map(Some).map_err(|e| {
        Error::input(format!(
            "{source}: line {}: not UTF-8 text (byte {}); expected a CSV file",
            line + 1,
            e.utf8_error().valid_up_to()
        ))
    })
}

/// Reads a `.npy` header; `Some((rows, d, size, kind))` for a C-ordered 1- or 2-D array
/// (the reader left at the data), `None` for a Fortran-ordered one (read whole).
fn open_npy(
    r: &mut BufReader<File>,
    source: &str,
    width: usize,
) -> Result<Option<(usize, usize, usize, char)>> {
    let mut pre = [0u8; 12];
    let got = read_up_to(r, &mut pre[..10]);
    if got == 0 {
        return Err(Error::input(format!(
            "{source}: file is empty; expected a .npy array"
        )));
    }
    if got < 10 || &pre[..6] != b"\x93NUMPY" {
        return Err(Error::input(format!(
            "{source}: not a valid .npy file: missing the \\x93NUMPY magic"
        )));
    }
    let (hlen, start) = match pre[6] {
        1 => (u16::from_le_bytes([pre[8], pre[9]]) as usize, 10),
        2 | 3 => {
            if read_up_to(r, &mut pre[10..12]) < 2 {
                return Err(Error::input(format!(
                    "{source}: not a valid .npy file: truncated header"
                )));
            }
            (
                u32::from_le_bytes([pre[8], pre[9], pre[10], pre[11]]) as usize,
                12,
            )
        }
        v => {
            return Err(Error::input(format!(
                "{source}: not a valid .npy file: unsupported format version {v}"
            )))
        }
    };
    if hlen > 1 << 20 {
        return Err(Error::input(format!(
            "{source}: not a valid .npy file: header of {hlen} bytes"
        )));
    }
    let mut head = vec![0u8; hlen];
    if read_up_to(r, &mut head) < hlen {
        return Err(Error::input(format!(
            "{source}: not a valid .npy file: header claims {hlen} bytes but the file ends first"
        )));
    }
    // The one header parser of the format (also used for whole files).
    let text = std::str::from_utf8(&head).map_err(|_| {
        Error::input(format!(
            "{source}: not a valid .npy file: header is not text"
        ))
    })?;
    let h = super::npy::parse_header(text, source)?;
    let (size, kind) = h.element(source)?;
    let (fortran, shape) = (h.fortran_order, h.shape);
    let (rows, d) = match shape.as_slice() {
        [n] => (*n, 1),
        [n, d] => (*n, *d),
        s => return Err(Error::input(shape_message(source, s))),
    };
    if fortran && d > 1 {
        return Ok(None);
    }
    if d != width {
        return Err(Error::input(format!(
            "{source}: the data have {d} features but the model expects {width}"
        )));
    }
    if rows == 0 {
        return Err(Error::input(format!("{source}: has no data rows")));
    }
    let need = (rows as u64)
        .checked_mul(d as u64)
        .and_then(|v| v.checked_mul(size as u64))
        .ok_or_else(|| Error::input(format!("{source}: not a valid .npy file: shape overflows")))?;
    let have = r.get_ref().metadata().map(|m| m.len()).unwrap_or(0);
    if have != (start + hlen) as u64 + need {
        return Err(Error::input(format!(
            "{source}: not a valid .npy file: shape {shape:?} needs {need} data bytes but the file has {} (truncated or corrupted)",
            have.saturating_sub((start + hlen) as u64)
        )));
    }
    Ok(Some((rows, d, size, kind)))
}

fn read_up_to(r: &mut impl Read, buf: &mut [u8]) -> usize {
    let mut got = 0;
    while got < buf.len() {
        match r.read(&mut buf[got..]) {
            Ok(0) | Err(_) => break,
            Ok(n) => got += n,
        }
    }
    got
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(d: usize) -> Vec<String> {
        (0..d).map(|j| format!("c{j}")).collect()
    }

    fn chunks(path: &Path, d: usize, size: usize) -> Result<Vec<Chunk>> {
        let mut f = RowFile::open_for_model(path, Some("y"), &names(d), false)?;
        let mut out = Vec::new();
        while let Some(c) = f.next_chunk(size)? {
            out.push(c);
        }
        Ok(out)
    }

    #[test]
    fn csv_chunks_equal_the_whole_file_and_errors_count_over_the_file() {
        let dir = std::env::temp_dir().join(format!("kp-stream-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("a.csv");
        let mut text = String::from("y,c1,c0\r\n");
        for i in 0..23 {
            text.push_str(&format!("l{i},{},{}\r\n", i as f64 * 0.5, -(i as f64)));
            if i == 7 {
                text.push('\n');
            }
        }
        std::fs::write(&p, &text).unwrap();
        let whole = super::super::read_for_model(&p, Some("y"), &names(2), false).unwrap();
        let cs = chunks(&p, 2, 5).unwrap();
        assert_eq!(cs.len(), 5);
        let mut all = Vec::new();
        let mut labels = Vec::new();
        for c in &cs {
            assert_eq!(c.first_row, all.len() / 2);
            all.extend(c.x.iter().copied());
            labels.extend(c.target.clone().unwrap());
        }
        assert_eq!(all, whole.table.x.iter().copied().collect::<Vec<_>>());
        assert_eq!(Some(labels), whole.table.target);
        // A bad cell in row 19 (line 21: the header and one blank line come first).
        std::fs::write(&p, text.replace("l18,9,-18", "l18,9,oops")).unwrap();
        let e = chunks(&p, 2, 5).unwrap_err().to_string();
        let w = super::super::read_for_model(&p, Some("y"), &names(2), false)
            .unwrap_err()
            .to_string();
        assert_eq!(e, w);
        assert!(e.contains("row 19 (line 21)"), "{e}");
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn npy_chunks_equal_the_whole_array() {
        let dir = std::env::temp_dir().join(format!("kp-stream-npy-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("a.npy");
        let data: Vec<f64> = (0..33).map(|v| v as f64 * 0.25 - 3.0).collect();
        super::super::write_npy_f64(&p, &[11, 3], &data).unwrap();
        let cs = chunks(&p, 3, 4).unwrap();
        let got: Vec<f64> = cs.iter().flat_map(|c| c.x.iter().copied()).collect();
        assert_eq!(got, data);
        assert_eq!(
            cs.iter().map(|c| c.first_row).collect::<Vec<_>>(),
            [0, 4, 8]
        );
        let mut bad = data.clone();
        bad[3 * 9 + 1] = f64::NAN;
        super::super::write_npy_f64(&p, &[11, 3], &bad).unwrap();
        let e = chunks(&p, 3, 4).unwrap_err().to_string();
        let w = super::super::read_npy(&p).unwrap_err().to_string();
        assert_eq!(e, w);
        assert!(e.contains("row 10, feature 1"), "{e}");
        std::fs::remove_dir_all(&dir).ok();
    }
}

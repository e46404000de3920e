//! NumPy `.npy` files (format versions 1–3): little-endian `f8`, `f4`, `i8`, `i4` arrays of
//! one or two dimensions, C or Fortran order. Header sizes are checked against the file
//! length before anything is allocated.

use crate::{Error, Result};
use ndarray::{Array1, Array2};
use std::path::Path;

/// A numeric array read from `.npy`, converted to `f64`.
#[derive(Debug, Clone)]
pub struct NpyArray {
    /// Shape (1 or 2 dimensions).
    pub shape: Vec<usize>,
    /// Values in C (row-major) order.
    pub data: Vec<f64>,
}

impl NpyArray {
    /// The array as `n × d` (a 1-D array becomes one column).
    pub fn into_2d(self, source: &str) -> Result<Array2<f64>> {
        let (r, c) = match self.shape.as_slice() {
            [n] => (*n, 1),
            [n, d] => (*n, *d),
            s => {
                return Err(Error::input(format!(
                    "{source}: array has shape {s:?}; expected 1 or 2 dimensions"
                )))
            }
        };
        Ok(Array2::from_shape_vec((r, c), self.data).expect("size checked"))
    }

    /// The array as a vector (1-D, or 2-D with one column or one row).
    pub fn into_1d(self, source: &str) -> Result<Array1<f64>> {
        match self.shape.as_slice() {
            [_] => Ok(Array1::from(self.data)),
            [_, 1] | [1, _] => Ok(Array1::from(self.data)),
            s => Err(Error::input(format!(
                "{source}: array has shape {s:?}; expected a vector"
            ))),
        }
    }
}

/// Reads a `.npy` file.
pub fn read_npy(path: &Path) -> Result<NpyArray> {
    let bytes = super::read_bytes(path)?;
    parse_npy(&bytes, &path.display().to_string())
}

fn bad(source: &str, what: impl std::fmt::Display) -> Error {
    Error::input(format!("{source}: not a valid .npy file: {what}"))
}

/// Parses `.npy` bytes; `source` names them in errors.
pub fn parse_npy(b: &[u8], source: &str) -> Result<NpyArray> {
    if b.is_empty() {
        return Err(Error::input(format!(
            "{source}: file is empty; expected a .npy array"
        )));
    }
    if b.len() < 10 || &b[..6] != b"\x93NUMPY" {
        return Err(bad(source, "missing the \\x93NUMPY magic"));
    }
    let major = b[6];
    let (hlen, start) = match major {
        1 => (u16::from_le_bytes([b[8], b[9]]) as usize, 10),
        2 | 3 => {
            if b.len() < 12 {
                return Err(bad(source, "truncated header"));
            }
            (u32::from_le_bytes([b[8], b[9], b[10], b[11]]) as usize, 12)
        }
        v => return Err(bad(source, format!("unsupported format version {v}"))),
    };
    if start + hlen > b.len() {
        return Err(bad(
            source,
            format!("header claims {hlen} bytes but the file has {}", b.len()),
        ));
    }
    let header = std::str::from_utf8(&b[start..start + hlen])
        .map_err(|_| bad(source, "header is not text"))?;
    let h = parse_header(header, source)?;
    let (size, kind) = h.element(source)?;
    let (fortran, shape) = (h.fortran_order, h.shape);
    if shape.is_empty() || shape.len() > 2 {
        return Err(Error::input(shape_message(source, &shape)));
    }
    let count = shape
        .iter()
        .try_fold(1usize, |a, &s| a.checked_mul(s))
        .ok_or_else(|| bad(source, "shape overflows"))?;
    let body = &b[start + hlen..];
    let need = count
        .checked_mul(size)
        .ok_or_else(|| bad(source, "shape overflows"))?;
    if body.len() != need {
        return Err(bad(
            source,
            format!(
                "shape {shape:?} needs {need} data bytes but the file has {} (truncated or corrupted)",
                body.len()
            ),
        ));
    }
    let mut data: Vec<f64> = body
        .chunks_exact(size)
        .map(|c| match (kind, size) {
            ('f', 8) => f64::from_le_bytes(c.try_into().unwrap()),
            ('f', _) => f32::from_le_bytes(c.try_into().unwrap()) as f64,
            (_, 8) => i64::from_le_bytes(c.try_into().unwrap()) as f64,
            _ => i32::from_le_bytes(c.try_into().unwrap()) as f64,
        })
        .collect();
    if fortran && shape.len() == 2 {
        let (r, c) = (shape[0], shape[1]);
        let mut t = vec![0.0; data.len()];
        for j in 0..c {
            for i in 0..r {
                t[i * c + j] = data[j * r + i];
            }
        }
        data = t;
    }
    if let Some(i) = data.iter().position(|v| !v.is_finite()) {
        let cols = if shape.len() == 2 { shape[1] } else { 1 };
        return Err(Error::input(not_finite_message(
            source,
            i / cols,
            i % cols,
            data[i],
        )));
    }
    Ok(NpyArray { shape, data })
}

/// The message for an array of a type the readers do not take (`descr` as NumPy writes
/// it, e.g. `<U3`); shared by the `.npy` reader and the Python binding.
pub fn dtype_message(source: &str, descr: &str) -> String {
    format!("{source}: dtype '{descr}' is not supported; expected little-endian float64 or float32")
}

/// The message for an array of neither one nor two dimensions.
pub fn shape_message(source: &str, shape: &[usize]) -> String {
    format!("{source}: array has shape {shape:?}; expected 1 or 2 dimensions")
}

/// The message for a value that is not finite at (0-based) `row`, `col` of a batch.
pub fn not_finite_message(source: &str, row: usize, col: usize, v: f64) -> String {
    format!(
        "{source}: row {}, feature {col}: value {v} is not finite",
        row + 1
    )
}

/// A `.npy` header: the three keys of the format's dictionary.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Header {
    /// The dtype string (`<f8`, …).
    pub descr: String,
    /// Column-major data.
    pub fortran_order: bool,
    /// The shape.
    pub shape: Vec<usize>,
}

impl Header {
    /// Bytes per value and kind (`'f'` float, `'i'` integer) of the dtypes read.
    pub fn element(&self, source: &str) -> Result<(usize, char)> {
        Ok(match self.descr.as_str() {
            "<f8" | "f8" | "|f8" | "=f8" => (8, 'f'),
            "<f4" | "f4" | "=f4" => (4, 'f'),
            "<i8" | "i8" | "=i8" => (8, 'i'),
            "<i4" | "i4" | "=i4" => (4, 'i'),
            other => return Err(Error::input(dtype_message(source, other))),
        })
    }
}

/// One token of the header's Python literal.
#[derive(Debug, Clone, PartialEq)]
enum Lit {
    Str(String),
    Bool(bool),
    Tuple(Vec<usize>),
}

/// Parses a `.npy` header as the format defines it (numpy's format documentation,
/// "NEP 1"): a Python dictionary literal with exactly the keys `'descr'`, `'fortran_order'`
/// and `'shape'` in any order, either quote style, any spacing, an optional trailing comma,
/// then padding spaces and a newline. Integers may carry Python 2's `L` suffix (files
/// written by old numpy). A repeated key keeps its last value, as Python's literal does.
pub(crate) fn parse_header(text: &str, source: &str) -> Result<Header> {
    let fail = |what: String| bad(source, format!("header {what}"));
    let c: Vec<char> = text.chars().collect();
    let mut i = 0;
    let ws = |i: &mut usize| {
        while *i < c.len() && c[*i].is_whitespace() {
            *i += 1;
        }
    };
    let string = |i: &mut usize| -> Option<String> {
        let q = *c.get(*i)?;
        if q != '\'' && q != '"' {
            return None;
        }
        let mut out = String::new();
        *i += 1;
        while *i < c.len() && c[*i] != q {
            if c[*i] == '\\' {
                return None;
            }
            out.push(c[*i]);
            *i += 1;
        }
        if *i >= c.len() {
            return None;
        }
        *i += 1;
        Some(out)
    };
    ws(&mut i);
    if c.get(i) != Some(&'{') {
        return Err(fail("is not a dictionary ('{' expected)".into()));
    }
    i += 1;
    let mut items: Vec<(String, Lit)> = Vec::new();
    loop {
        ws(&mut i);
        if c.get(i) == Some(&'}') {
            i += 1;
            break;
        }
        let key =
            string(&mut i).ok_or_else(|| fail(format!("has no quoted key at character {i}")))?;
        ws(&mut i);
        if c.get(i) != Some(&':') {
            return Err(fail(format!("has no ':' after '{key}'")));
        }
        i += 1;
        ws(&mut i);
        let value = if let Some(v) = string(&mut i) {
            Lit::Str(v)
        } else if c[i..].starts_with(&['T', 'r', 'u', 'e']) {
            i += 4;
            Lit::Bool(true)
        } else if c[i..].starts_with(&['F', 'a', 'l', 's', 'e']) {
            i += 5;
            Lit::Bool(false)
        } else if c.get(i) == Some(&'(') {
            i += 1;
            let mut v = Vec::new();
            loop {
                ws(&mut i);
                if c.get(i) == Some(&')') {
                    i += 1;
                    break;
                }
                let st = i;
                while i < c.len() && c[i].is_ascii_digit() {
                    i += 1;
                }
                let n: usize = c[st..i]
                    .iter()
                    .collect::<String>()
                    .parse()
                    .map_err(|_| fail(format!("'{key}' is not a tuple of sizes")))?;
                if matches!(c.get(i), Some('L') | Some('l')) {
                    i += 1;
                }
                v.push(n);
                ws(&mut i);
                match c.get(i) {
                    Some(',') => i += 1,
                    Some(')') => {}
                    _ => return Err(fail(format!("'{key}' is not a tuple of sizes"))),
                }
            }
            Lit::Tuple(v)
        } else {
            return Err(fail(format!("has an unreadable value for '{key}'")));
        };
        items.retain(|(k, _)| *k != key);
        items.push((key, value));
        ws(&mut i);
        match c.get(i) {
            Some(',') => i += 1,
            Some('}') => {}
            _ => return Err(fail("entries are not separated by ','".into())),
        }
    }
    if c[i..].iter().any(|ch| !ch.is_whitespace()) {
        return Err(fail("has text after the dictionary".into()));
    }
    let mut descr = None;
    let mut fortran = None;
    let mut shape = None;
    for (k, v) in items {
        match (k.as_str(), v) {
            ("descr", Lit::Str(s)) => descr = Some(s),
            ("fortran_order", Lit::Bool(b)) => fortran = Some(b),
            ("shape", Lit::Tuple(t)) => shape = Some(t),
            ("descr" | "fortran_order" | "shape", _) => {
                return Err(fail(format!("'{k}' has the wrong type")))
            }
            (other, _) => return Err(fail(format!("has the unexpected key '{other}'"))),
        }
    }
    match (descr, fortran, shape) {
        (Some(descr), Some(fortran_order), Some(shape)) => Ok(Header {
            descr,
            fortran_order,
            shape,
        }),
        _ => Err(fail(
            "lacks one of 'descr', 'fortran_order' and 'shape'".into(),
        )),
    }
}

fn npy_bytes(shape: &[usize], descr: &str, body: Vec<u8>) -> Vec<u8> {
    let shape_s = match shape {
        [n] => format!("({n},)"),
        s => format!(
            "({})",
            s.iter()
                .map(|v| v.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    };
    let mut h = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_s}, }}");
    let total = 10 + h.len() + 1;
    let pad = (64 - total % 64) % 64;
    h.push_str(&" ".repeat(pad));
    h.push('\n');
    let mut out = Vec::with_capacity(10 + h.len() + body.len());
    out.extend_from_slice(b"\x93NUMPY\x01\x00");
    out.extend_from_slice(&(h.len() as u16).to_le_bytes());
    out.extend_from_slice(h.as_bytes());
    out.extend_from_slice(&body);
    out
}

/// Writes a float64 array (shape `shape`, C order) to `path` atomically.
pub fn write_npy_f64(path: &Path, shape: &[usize], data: &[f64]) -> Result<()> {
    let body = data.iter().flat_map(|v| v.to_le_bytes()).collect();
    super::write_atomic(path, &npy_bytes(shape, "<f8", body))
}

/// Writes a float32 array (shape `shape`, C order) to `path` atomically.
pub fn write_npy_f32(path: &Path, shape: &[usize], data: &[f32]) -> Result<()> {
    let body = data.iter().flat_map(|v| v.to_le_bytes()).collect();
    super::write_atomic(path, &npy_bytes(shape, "<f4", body))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_and_bad_sizes() {
        let body: Vec<u8> = [1.0f64, 2.0, 3.0, 4.0, 5.0, 6.0]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect();
        let b = npy_bytes(&[2, 3], "<f8", body);
        assert_eq!((10 + u16::from_le_bytes([b[8], b[9]]) as usize) % 64, 0);
        let a = parse_npy(&b, "t.npy").unwrap();
        assert_eq!(a.shape, vec![2, 3]);
        assert_eq!(a.data[5], 6.0);
        // truncated
        let e = parse_npy(&b[..b.len() - 3], "t.npy").unwrap_err();
        assert!(e.to_string().contains("truncated"), "{e}");
        // absurd shape: checked before allocating
        let huge = npy_bytes(&[1 << 40, 1 << 30], "<f8", vec![]);
        assert!(parse_npy(&huge, "t.npy").is_err());
        assert!(parse_npy(b"hello", "t.npy").is_err());
    }

    #[test]
    fn header_spellings_numpy_accepts() {
        // Every spelling a Python dict literal allows (the format documentation).
        let want = Header {
            descr: "<f8".into(),
            fortran_order: true,
            shape: vec![2, 3],
        };
        for h in [
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 3), }",
            "{'descr':'<f8','fortran_order':True,'shape':(2,3)}",
            "{\"descr\": \"<f8\", \"fortran_order\": True, \"shape\": (2, 3)}",
            "{'shape': (2L, 3L), 'fortran_order': True, 'descr': '<f8'}   \n",
            "{ 'fortran_order' : True , 'descr' : '<f8' , 'shape' : ( 2 , 3 , ) , }",
        ] {
            assert_eq!(parse_header(h, "t").unwrap(), want, "{h}");
        }
        assert_eq!(
            parse_header(
                "{'descr': '<f4', 'fortran_order': False, 'shape': (5,)}",
                "t"
            )
            .unwrap()
            .shape,
            vec![5]
        );
        for bad in [
            "{'descr': '<f8', 'shape': (2, 3)}",
            "{'descr': '<f8', 'fortran_order': 1, 'shape': (2, 3)}",
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 3), 'x': 1}",
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, -3)}",
            "{'descr': '<f8', 'fortran_order': True, 'shape': (2, 3)} x",
        ] {
            assert!(parse_header(bad, "t").is_err(), "{bad}");
        }
    }
}

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
    let descr = dict_value(header, "descr").ok_or_else(|| bad(source, "no 'descr' in header"))?;
    let descr = descr.trim_matches(|c| c == '\'' || c == '"');
    let (size, kind) = match descr {
        "<f8" | "f8" => (8, 'f'),
        "<f4" | "f4" => (4, 'f'),
        "<i8" | "i8" => (8, 'i'),
        "<i4" | "i4" => (4, 'i'),
        other => return Err(Error::input(dtype_message(source, other))),
    };
    let fortran = dict_value(header, "fortran_order")
        .map(|v| v.trim() == "True")
        .unwrap_or(false);
    let shape_s = dict_value(header, "shape").ok_or_else(|| bad(source, "no 'shape' in header"))?;
    let shape: Vec<usize> = shape_s
        .trim_matches(|c| c == '(' || c == ')')
        .split(',')
        .map(|s| s.trim())
        .filter(|s| !s.is_empty())
        .map(|s| s.parse::<usize>())
        .collect::<std::result::Result<_, _>>()
        .map_err(|_| bad(source, format!("shape {shape_s} is not a list of sizes")))?;
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

fn dict_value<'a>(header: &'a str, key: &str) -> Option<&'a str> {
    let k1 = format!("'{key}'");
    let at = header.find(&k1)? + k1.len();
    let rest = header[at..].trim_start().strip_prefix(':')?.trim_start();
    if rest.starts_with('(') {
        let end = rest.find(')')?;
        Some(&rest[..=end])
    } else {
        let end = rest.find(',').or_else(|| rest.find('}'))?;
        Some(rest[..end].trim())
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
}

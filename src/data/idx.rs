//! IDX files (the format of the MNIST family), plain or gzip-compressed: unsigned-byte
//! images `n × rows × cols` and labels `n`. Sizes in the header are checked against the
//! data before anything is allocated.

use crate::{Error, Result};
use ndarray::Array2;
use std::io::Read;
use std::path::Path;

fn read_maybe_gz(path: &Path) -> Result<Vec<u8>> {
    let raw = super::read_bytes(path)?;
    if raw.len() >= 2 && raw[0] == 0x1f && raw[1] == 0x8b {
        let mut out = Vec::new();
        flate2::read::GzDecoder::new(&raw[..])
            .read_to_end(&mut out)
            .map_err(|e| Error::input(format!("{}: bad gzip data: {e}", path.display())))?;
        Ok(out)
    } else {
        Ok(raw)
    }
}

fn header(b: &[u8], src: &str, want_dims: usize) -> Result<Vec<usize>> {
    if b.len() < 4 + 4 * want_dims || b[0] != 0 || b[1] != 0 || b[2] != 0x08 {
        return Err(Error::input(format!(
            "{src}: not an unsigned-byte IDX file"
        )));
    }
    if b[3] as usize != want_dims {
        return Err(Error::input(format!(
            "{src}: IDX file has {} dimensions; expected {want_dims}",
            b[3]
        )));
    }
    let dims: Vec<usize> = (0..want_dims)
        .map(|i| u32::from_be_bytes(b[4 + 4 * i..8 + 4 * i].try_into().unwrap()) as usize)
        .collect();
    let need: usize = dims.iter().product::<usize>() + 4 + 4 * want_dims;
    if need != b.len() {
        return Err(Error::input(format!(
            "{src}: IDX header claims {dims:?} ({need} bytes) but the file has {}",
            b.len()
        )));
    }
    Ok(dims)
}

/// Reads IDX images as an `n × (rows·cols)` array of pixel values scaled to [0, 1].
pub fn read_idx_images(path: &Path) -> Result<Array2<f64>> {
    let b = read_maybe_gz(path)?;
    let dims = header(&b, &path.display().to_string(), 3)?;
    let d = dims[1] * dims[2];
    let px = &b[16..];
    Ok(Array2::from_shape_fn((dims[0], d), |(i, j)| {
        px[i * d + j] as f64 / 255.0
    }))
}

/// Reads IDX labels.
pub fn read_idx_labels(path: &Path) -> Result<Vec<u8>> {
    let b = read_maybe_gz(path)?;
    header(&b, &path.display().to_string(), 1)?;
    Ok(b[8..].to_vec())
}

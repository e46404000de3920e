//! Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence) from Debian's
//! `dataset-fashion-mnist` (IDX files in /usr/share/datasets/fashion-mnist/), shared by the
//! examples that benchmark on it.

use kernelpress::data::{read_idx_images, read_idx_labels};
use ndarray::Array2;
use std::path::Path;

/// The IDX folder Debian's package installs.
pub const DIR: &str = "/usr/share/datasets/fashion-mnist";

/// Pixels 0–255 (rows of 784) and class labels ("0" … "9").
pub struct Split {
    pub x: Array2<f64>,
    pub y: Vec<String>,
}

/// The 60,000 training and 10,000 test images.
pub fn load() -> kernelpress::Result<(Split, Split)> {
    let dir = Path::new(DIR);
    let one = |images: &str, labels: &str| -> kernelpress::Result<Split> {
        Ok(Split {
            x: read_idx_images(&dir.join(images))?.mapv(|v| v * 255.0),
            y: read_idx_labels(&dir.join(labels))?
                .iter()
                .map(|v| v.to_string())
                .collect(),
        })
    };
    Ok((
        one("train-images-idx3-ubyte.gz", "train-labels-idx1-ubyte.gz")?,
        one("t10k-images-idx3-ubyte.gz", "t10k-labels-idx1-ubyte.gz")?,
    ))
}

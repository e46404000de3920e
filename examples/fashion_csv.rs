//! Converts Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence; Debian package
//! `dataset-fashion-mnist`) from its IDX files to CSV for the command line: raw pixel values
//! 0–255 in columns `p0 … p783` and the class index in `label`.
//!
//! Run: `cargo run --release --example fashion_csv -- OUT_DIR [TRAIN_SUBSET]`
//! Writes `OUT_DIR/train_subset.csv` (the first TRAIN_SUBSET training images, default
//! 10000), `OUT_DIR/train_all.csv` (all 60000) and `OUT_DIR/test.csv` (10000).

use kernelpress::data::{read_idx_images, read_idx_labels, write_atomic};
use std::path::Path;

fn write(path: &Path, x: &ndarray::Array2<f64>, y: &[u8], rows: usize) -> std::io::Result<()> {
    let mut s = String::with_capacity(rows * 2000);
    let names: Vec<String> = (0..x.ncols()).map(|j| format!("p{j}")).collect();
    s.push_str(&names.join(","));
    s.push_str(",label\n");
    for i in 0..rows {
        for j in 0..x.ncols() {
            s.push_str(&((x[[i, j]] * 255.0).round() as u32).to_string());
            s.push(',');
        }
        s.push_str(&y[i].to_string());
        s.push('\n');
    }
    write_atomic(path, s.as_bytes()).map_err(|e| std::io::Error::other(e.to_string()))
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().collect();
    let out = Path::new(args.get(1).map(|s| s.as_str()).unwrap_or("target/fashion"));
    let subset: usize = args
        .get(2)
        .map(|s| s.parse())
        .transpose()?
        .unwrap_or(10_000);
    std::fs::create_dir_all(out)?;
    let dir = Path::new("/usr/share/datasets/fashion-mnist");
    let xtr = read_idx_images(&dir.join("train-images-idx3-ubyte.gz"))?;
    let ytr = read_idx_labels(&dir.join("train-labels-idx1-ubyte.gz"))?;
    let xte = read_idx_images(&dir.join("t10k-images-idx3-ubyte.gz"))?;
    let yte = read_idx_labels(&dir.join("t10k-labels-idx1-ubyte.gz"))?;
    write(
        &out.join("train_subset.csv"),
        &xtr,
        &ytr,
        subset.min(xtr.nrows()),
    )?;
    write(&out.join("train_all.csv"), &xtr, &ytr, xtr.nrows())?;
    write(&out.join("test.csv"), &xte, &yte, xte.nrows())?;
    println!(
        "wrote {}: {} / {} / {} rows",
        out.display(),
        subset,
        xtr.nrows(),
        xte.nrows()
    );
    Ok(())
}

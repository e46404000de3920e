//! Regenerates the demo scenario in `models/` deterministically:
//! `pump_train.csv`, `pump_calib.csv`, `pump_test.csv` and the exact SVM
//! `pump_svm.safetensors`.
//!
//! Run: `cargo run --release --example make_demo`

mod scenario;

use kernelpress::data::{read_csv_str, write_atomic, Standardizer};
use kernelpress::exact::{fit_svm, SmoOptions};
use scenario::{pump_data, to_csv};
use std::path::Path;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let dir = Path::new("models");
    std::fs::create_dir_all(dir)?;
    let sets = [
        ("pump_train.csv", 5000, 11),
        ("pump_calib.csv", 8000, 12),
        ("pump_test.csv", 3000, 13),
    ];
    for (name, n, seed) in sets {
        let (x, y) = pump_data(n, seed);
        write_atomic(&dir.join(name), to_csv(&x, &y).as_bytes())?;
    }
    // Train from the CSV text (the same rounded values a user would read back).
    let text = std::fs::read_to_string(dir.join("pump_train.csv"))?;
    let t = read_csv_str(&text, "models/pump_train.csv", Some("condition"))?;
    let s = Standardizer::fit(t.x.view());
    let xs = s.apply(t.x.view());
    let kernel = "gaussian(gamma=0.25)".parse()?;
    let opts = SmoOptions {
        c: 10.0,
        ..SmoOptions::default()
    };
    let mut m = fit_svm(
        &kernel,
        xs.view(),
        t.target.as_ref().unwrap(),
        &opts,
        Some(s),
        &kernelpress::observe::Silent,
    )?;
    m.feature_names = t.columns.clone();
    m.save(&dir.join("pump_svm.safetensors"))?;
    println!(
        "wrote models/: exact SVM with {} support vectors, {} decision values",
        m.n_support_vectors(),
        m.n_outputs()
    );
    Ok(())
}

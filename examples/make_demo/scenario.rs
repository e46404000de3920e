//! The demo scenario: pump condition monitoring from vibration summaries. All data are
//! invented here by a seeded generator; nothing comes from a real source.
//!
//! Each row summarises one minute of accelerometer readings on a centrifugal pump:
//! `vib_rms` (mm/s), `vib_peak` (g), `crest_factor`, `kurtosis`, `band_1x`, `band_2x`,
//! `band_bearing` (spectral band energies) and `bearing_temp` (°C). The condition is one
//! of `healthy`, `imbalance`, `misalignment`, `bearing_wear`. Classes overlap on purpose
//! (mild faults look healthy), so an exact SVM needs thousands of support vectors.

use ndarray::Array2;
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, Normal, StandardNormal};

/// Feature names of the demo data, in column order.
pub const FEATURES: [&str; 8] = [
    "vib_rms",
    "vib_peak",
    "crest_factor",
    "kurtosis",
    "band_1x",
    "band_2x",
    "band_bearing",
    "bearing_temp",
];

/// Condition labels of the demo data.
pub const CONDITIONS: [&str; 4] = ["healthy", "imbalance", "misalignment", "bearing_wear"];

/// Draws `n` rows of pump data with seed `seed`: features and condition labels.
///
/// ```
/// let (x, y) = kernelpress::demo::pump_data(10, 1);
/// assert_eq!(x.dim(), (10, 8));
/// assert_eq!(y.len(), 10);
/// ```
pub fn pump_data(n: usize, seed: u64) -> (Array2<f64>, Vec<String>) {
    let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(seed);
    let mut x = Array2::<f64>::zeros((n, FEATURES.len()));
    let mut y = Vec::with_capacity(n);
    let noise = Normal::new(0.0, 1.0).unwrap();
    for i in 0..n {
        let c: usize = rng.random_range(0..4);
        // Severity of the fault: 0 for healthy, mild to strong otherwise.
        let sev: f64 = if c == 0 {
            0.0
        } else {
            rng.random_range(0.05..1.0)
        };
        let load: f64 = rng.random_range(0.4..1.0);
        let e = |rng: &mut rand::rngs::ChaCha20Rng, s: f64| -> f64 {
            let z: f64 = noise.sample(rng);
            z * s
        };
        let base_rms = 1.8 + 1.2 * load;
        let (mut b1, mut b2, mut bb, mut kurt, mut temp) =
            (1.0, 0.35, 0.2, 3.0, 45.0 + 15.0 * load);
        match c {
            1 => b1 += 1.6 * sev,
            2 => {
                b2 += 1.1 * sev;
                b1 += 0.4 * sev;
                temp += 4.0 * sev;
            }
            3 => {
                bb += 0.9 * sev;
                kurt += 3.5 * sev * sev;
                temp += 9.0 * sev;
            }
            _ => {}
        }
        b1 *= (e(&mut rng, 0.25)).exp();
        b2 *= (e(&mut rng, 0.30)).exp();
        bb *= (e(&mut rng, 0.35)).exp();
        kurt += e(&mut rng, 0.6).abs();
        let rms = base_rms * (b1 * b1 + b2 * b2 + bb * bb).sqrt() / 1.1 * (e(&mut rng, 0.1)).exp();
        let crest = (2.8 + 0.35 * (kurt - 3.0)) * (e(&mut rng, 0.08)).exp();
        let peak = rms * crest / 9.81 * 1.4;
        temp += e(&mut rng, 3.0);
        let row = [rms, peak, crest, kurt, b1, b2, bb, temp];
        for (j, v) in row.iter().enumerate() {
            x[[i, j]] = *v;
        }
        // A few mislabelled minutes, as in any maintenance log.
        let lab = if rng.random::<f64>() < 0.03 {
            rng.random_range(0..4)
        } else {
            c
        };
        let _: f64 = StandardNormal.sample(&mut rng);
        y.push(CONDITIONS[lab].to_string());
    }
    (x, y)
}

/// Formats rows and labels as CSV text with the demo header (`condition` last).
pub fn to_csv(x: &Array2<f64>, y: &[String]) -> String {
    let mut s = FEATURES.join(",");
    s.push_str(",condition\n");
    for (row, lab) in x.rows().into_iter().zip(y) {
        let cells: Vec<String> = row.iter().map(|v| format!("{v:.5}")).collect();
        s.push_str(&cells.join(","));
        s.push(',');
        s.push_str(lab);
        s.push('\n');
    }
    s
}

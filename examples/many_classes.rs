//! Heads for many outputs, on an invented scenario of our own: a parcel-sorting camera that
//! reads 16 shape measurements of a hand-written destination code and must tell 26 codes
//! apart. Each code's measurements come from three blobs (three common ways of writing
//! it); the codes overlap, so the exact Gaussian SVM (one-vs-one: 325 decision values)
//! keeps thousands of support vectors.
//!
//! Data (generated here, seed 26): 15,000 training rows (the teacher), 30,000 calibration
//! rows, 5,000 test rows, all from the same distribution. Teacher: Gaussian SVM, γ = 1/16
//! on standardised columns, C = 10 (cached in target/many/teacher.safetensors).
//!
//! For each feature count given, the compiled Hadamard model with its full head and with
//! the factored head (`--head-rank auto`: the smallest rank within 0.002 of the full head's
//! agreement on the ridge-choice rows): label agreement with the teacher on the test rows,
//! f32 single-row latency (median of 2,000 rows), head weights, and the exact model's f32
//! single row in the same run. Writes one JSON object.
//!
//! Run: `cargo run --release --example many_classes -- [OUT.json] [FEATURES,...]`
//! (default `target/many/many_classes.json 4096`). With `KP_MANY_CSV=1` it also writes
//! `target/many/calib.csv` (15,000 calibration rows) and `target/many/test.csv` for
//! `kernelpress sweep`.

use kernelpress::data::Standardizer;
use kernelpress::exact::{fit_svm, SmoOptions};
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{HeadRank, RidgeGrid, Teacher};
use kernelpress::model::{label_indices, CompiledModel, ExactModel};
use kernelpress::observe::Silent;
use ndarray::{s, Array2, ArrayView2};
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, Normal};
use serde_json::json;
use std::time::Instant;

const CLASSES: usize = 26;
const COLS: usize = 16;

/// `n` rows of the scenario and their codes ("A" … "Z"), from `rng`.
fn draw(
    rng: &mut rand::rngs::ChaCha20Rng,
    centres: &Array2<f64>,
    n: usize,
) -> (Array2<f64>, Vec<String>) {
    let noise = Normal::new(0.0, 1.0).expect("normal");
    let mut x = Array2::zeros((n, COLS));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let c = rng.random_range(0..CLASSES);
        let blob = c * 3 + rng.random_range(0..3);
        for j in 0..COLS {
            x[[i, j]] = centres[[blob, j]] + noise.sample(rng);
        }
        y.push(((b'A' + c as u8) as char).to_string());
    }
    (x, y)
}

fn labels_of(m_task: kernelpress::model::Task, k: usize, d: ArrayView2<f64>) -> Vec<usize> {
    label_indices(m_task, k, d)
}

fn median_us(x: ArrayView2<f64>, rows: usize, mut f: impl FnMut(&[f64])) -> f64 {
    let mut t: Vec<f64> = Vec::new();
    for r in x.rows().into_iter().take(rows) {
        let row = r.to_vec();
        let t0 = Instant::now();
        f(&row);
        t.push(t0.elapsed().as_secs_f64() * 1e6);
    }
    t.sort_by(f64::total_cmp);
    t[t.len() / 2]
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().collect();
    let out = args
        .get(1)
        .cloned()
        .unwrap_or_else(|| "target/many/many_classes.json".into());
    let sizes: Vec<usize> = args
        .get(2)
        .cloned()
        .unwrap_or_else(|| "4096".into())
        .split(',')
        .map(|v| v.parse())
        .collect::<Result<_, _>>()?;
    std::fs::create_dir_all("target/many")?;
    let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(26);
    let spread = Normal::new(0.0, 1.6)?;
    let centres = Array2::from_shape_fn((CLASSES * 3, COLS), |_| spread.sample(&mut rng));
    let (train_x, train_y) = draw(&mut rng, &centres, 15_000);
    let (calib, calib_y) = draw(&mut rng, &centres, 30_000);
    let (test, test_y) = draw(&mut rng, &centres, 5_000);
    if std::env::var("KP_MANY_CSV").is_ok() {
        // For `kernelpress sweep`: the first 15,000 calibration rows and the test rows, with
        // the code as the target column.
        let mut header: Vec<String> = (1..=COLS).map(|j| format!("m{j}")).collect();
        header.push("code".into());
        let rows = |x: ArrayView2<f64>, y: &[String]| -> Vec<Vec<String>> {
            x.rows()
                .into_iter()
                .zip(y)
                .map(|(r, l)| {
                    let mut v: Vec<String> = r.iter().map(|v| format!("{v:?}")).collect();
                    v.push(l.clone());
                    v
                })
                .collect()
        };
        kernelpress::data::write_csv(
            std::path::Path::new("target/many/calib.csv"),
            &header,
            &rows(calib.slice(s![..15_000, ..]), &calib_y[..15_000]),
        )?;
        kernelpress::data::write_csv(
            std::path::Path::new("target/many/test.csv"),
            &header,
            &rows(test.view(), &test_y),
        )?;
    }
    let cache = std::path::Path::new("target/many/teacher.safetensors");
    let teacher = if cache.exists() {
        ExactModel::load(cache)?
    } else {
        let scaler = Standardizer::fit(train_x.view());
        let xs = scaler.apply(train_x.view());
        let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.0625)".parse()?;
        let t0 = Instant::now();
        let svm = fit_svm(
            &kernel,
            xs.view(),
            &train_y,
            &SmoOptions {
                c: 10.0,
                ..Default::default()
            },
            Some(scaler),
            &Silent,
        )?;
        eprintln!(
            "teacher: {} support vectors, {} outputs, in {:.1} s",
            svm.n_support_vectors(),
            svm.n_outputs(),
            t0.elapsed().as_secs_f64()
        );
        svm.save(cache)?;
        svm
    };
    let (task, k) = (teacher.task(), teacher.labels().len());
    let want = labels_of(task, k, teacher.decision(test.view()).view());
    let exact_f32_us = median_us(test.view(), 300, |r| {
        std::hint::black_box(teacher.decision_one_f32(r));
    });
    let t = Teacher::new(&teacher, calib.view(), &Silent)?;
    let agreement = |m: &CompiledModel| -> f64 {
        let got = labels_of(task, k, m.decision(test.view()).view());
        got.iter().zip(&want).filter(|(a, b)| a == b).count() as f64 / want.len() as f64
    };
    let latency = |m: &CompiledModel| -> f64 {
        // Two rounds, the faster kept (a shared machine has noisy spells).
        let once = || {
            median_us(test.slice(s![.., ..]), 2000, |r| {
                std::hint::black_box(m.decision_one_f32(r));
            })
        };
        once().min(once())
    };
    let mut results = Vec::new();
    for d in sizes {
        let spec = FeatureSpec::new(teacher.kernel().clone(), Method::Hadamard, COLS, d, 1);
        let t0 = Instant::now();
        let (full, _) = t.distil(&spec, &RidgeGrid::standard(), None, &Silent)?;
        let fit_s = t0.elapsed().as_secs_f64();
        let t1 = Instant::now();
        let (fact, sum) = t.factor_head(&full, HeadRank::Auto { tolerance: 0.002 })?;
        let factor_s = t1.elapsed().as_secs_f64();
        let (a_full, a_fact) = (agreement(&full), agreement(&fact));
        let (l_full, l_fact) = (latency(&full), latency(&fact));
        let r = json!({
            "method": "hadamard", "features": d, "rank": sum.rank,
            "head_weights_full": sum.weights.0, "weights_factored": sum.weights.1,
            "ranks_tried": sum.tried.iter().map(|(r, f)| json!([r, f])).collect::<Vec<_>>(),
            "agreement_full": a_full, "agreement_factored": a_fact,
            "single_row_f32_us_full": l_full, "single_row_f32_us_factored": l_fact,
            "speedup_single_full": exact_f32_us / l_full,
            "speedup_single_factored": exact_f32_us / l_fact,
            "distil_s": fit_s, "factor_s": factor_s,
        });
        eprintln!("{r}");
        results.push(r);
    }
    let doc = json!({
        "scenario": "invented: 26 destination codes, 16 shape measurements, 3 blobs per code (seed 26)",
        "teacher": {"support_vectors": teacher.n_support_vectors(), "outputs": teacher.n_outputs(),
                    "single_row_f32_us": exact_f32_us},
        "calibration_rows": 30_000, "test_rows": 5_000,
        "threads": rayon::current_num_threads(),
        "results": results,
    });
    std::fs::write(&out, serde_json::to_string_pretty(&doc)? + "\n")?;
    eprintln!("wrote {out}");
    Ok(())
}

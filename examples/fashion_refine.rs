//! Refinement on real images: Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence;
//! Debian package `dataset-fashion-mnist`).
//!
//! Teacher: exact Gaussian C-SVM (γ = 1/784 on standardised pixels, C = 10) on training
//! images 1–10,000 (cached in target/fashion/teacher10k.safetensors); calibration: training
//! images 10,001–40,000, which the teacher never saw; evaluation: the 10,000 test images.
//! For each (method, features, passes): label agreement with the teacher on the test images
//! of the map distilled as usual and of the same map refined, decision RMSE, refinement
//! seconds, and the f32 single-row latency of both (median of 2,000 rows).
//!
//! Run: `cargo run --release --example fashion_refine -- [OUT.json] [method:features:passes[:rate],...]`
//! (default `nystrom:1024:8,hadamard:4096:4`; benches/refine.sh runs `nystrom:1024:40,hadamard:4096:12`).

#[path = "common/fashion.rs"]
mod fashion;

use kernelpress::data::Standardizer;
use kernelpress::exact::{fit_svm, SmoOptions};
use kernelpress::features::{FeatureSpec, Landmarks, Method};
use kernelpress::fit::{RefineOptions, RidgeGrid, Teacher};
use kernelpress::model::{label_indices, CompiledModel, ExactModel};
use kernelpress::observe::Silent;
use ndarray::{s, Array2, ArrayView2};
use serde_json::json;
use std::time::Instant;

fn agreement(m: &CompiledModel, x: ArrayView2<f64>, want: &[usize]) -> (f64, f64, Array2<f64>) {
    let d = m.decision(x);
    let got = label_indices(m.task(), m.labels().len(), d.view());
    let a = got.iter().zip(want).filter(|(g, w)| g == w).count() as f64 / want.len() as f64;
    (a, 0.0, d)
}

fn latency_us(m: &CompiledModel, x: ArrayView2<f64>) -> f64 {
    let mut t: Vec<f64> = Vec::new();
    for r in x.rows().into_iter().take(2000) {
        let row = r.to_vec();
        let t0 = Instant::now();
        std::hint::black_box(m.decision_one_f32(&row));
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
        .unwrap_or_else(|| "target/fashion/refine.json".into());
    let runs: Vec<(String, usize, usize, Option<f64>)> = args
        .get(2)
        .cloned()
        .unwrap_or_else(|| "nystrom:1024:8,hadamard:4096:4".into())
        .split(',')
        .map(|r| {
            let v: Vec<&str> = r.split(':').collect();
            (
                v[0].to_string(),
                v[1].parse().unwrap(),
                v[2].parse().unwrap(),
                v.get(3).map(|r| r.parse().unwrap()),
            )
        })
        .collect();
    let (train, test) = fashion::load()?;
    std::fs::create_dir_all("target/fashion")?;
    let cache = std::path::Path::new("target/fashion/teacher10k.safetensors");
    let teacher: ExactModel = if cache.exists() {
        ExactModel::load(cache)?
    } else {
        let sub = train.x.slice(s![..10_000, ..]);
        let scaler = Standardizer::fit(sub);
        let xs = scaler.apply(sub);
        let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.0012755)".parse()?;
        let t0 = Instant::now();
        let svm = fit_svm(
            &kernel,
            xs.view(),
            &train.y[..10_000],
            &SmoOptions {
                c: 10.0,
                ..Default::default()
            },
            Some(scaler),
            &Silent,
        )?;
        eprintln!(
            "teacher: {} support vectors in {:.1} s",
            svm.n_support_vectors(),
            t0.elapsed().as_secs_f64()
        );
        svm.save(cache)?;
        svm
    };
    let calib = train.x.slice(s![10_000..40_000, ..]);
    let td = teacher.decision(test.x.view());
    let want = label_indices(teacher.task(), teacher.labels().len(), td.view());
    let t = Teacher::new(&teacher, calib, &Silent)?;
    let grid = RidgeGrid::standard();
    let mut results = Vec::new();
    for (method, features, passes, rate) in runs {
        let mut spec = FeatureSpec::new(
            teacher.kernel().clone(),
            Method::parse(&method)?,
            784,
            features,
            1,
        );
        if method == "nystrom" {
            spec.options.landmarks = Landmarks::Support;
        }
        let (plain, _) = t.distil(&spec, &grid, None, &Silent)?;
        let (a0, _, d0) = agreement(&plain, test.x.view(), &want);
        let mut opts = RefineOptions::new(passes)?;
        if let Some(r) = rate {
            opts.rate = r;
        }
        let opts = opts.checked()?;
        let t0 = Instant::now();
        let (refined, _, sum) = t.distil_refined(&spec, &grid, None, &opts, &Silent)?;
        let secs = t0.elapsed().as_secs_f64();
        let (a1, _, d1) = agreement(&refined, test.x.view(), &want);
        let rmse = |d: &Array2<f64>| (d - &td).mapv(|v| v * v).mean().unwrap().sqrt();
        let (l0, l1) = (
            latency_us(&plain, test.x.view()),
            latency_us(&refined, test.x.view()),
        );
        let r = json!({
            "method": method, "features": features, "passes_max": passes, "rate": opts.rate,
            "passes_run": sum.passes_run, "best_pass": sum.best_pass,
            "agreement_test_before": a0, "agreement_test_after": a1,
            "decision_rmse_before": rmse(&d0), "decision_rmse_after": rmse(&d1),
            "audit_agreement": [sum.audit_agreement.0, sum.audit_agreement.1],
            "refine_seconds": secs,
            "single_row_f32_us_before": l0, "single_row_f32_us_after": l1,
        });
        eprintln!("{r}");
        results.push(r);
    }
    let doc = json!({
        "teacher": {"images": 10000, "support_vectors": teacher.n_support_vectors()},
        "calibration": "training images 10,001–40,000",
        "evaluated_on": "the 10,000 test images",
        "threads": rayon::current_num_threads(),
        "results": results,
    });
    std::fs::write(&out, serde_json::to_string_pretty(&doc)? + "\n")?;
    eprintln!("wrote {out}");
    Ok(())
}

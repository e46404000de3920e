//! Refinement on real images: Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence;
//! Debian package `dataset-fashion-mnist`).
//!
//! Teacher: exact Gaussian C-SVM (γ = 1/784 on standardised pixels, C = 10) on training
//! images 1–10,000 (cached in target/fashion/teacher10k.safetensors); calibration: training
//! images 10,001–40,000, which the teacher never saw; evaluation: the 10,000 test images.
//! With `KP_FASHION_TEACHER=60000`: the teacher on all 60,000 training images (cached in
//! teacher60k.safetensors), calibrated on those same images. The output also gives the
//! exact model's f32 single-row latency (median of 200 test images).
//! For each (method, features, passes): label agreement with the teacher on the test images
//! of the map distilled as usual and of the same map refined, decision RMSE, refinement
//! seconds, and the f32 single-row latency of both (median of 2,000 rows).
//!
//! With a fifth field (`method:features:passes:rate:P`), both models are also guarded at
//! agreement P and measured on the test images (mean single-row speedup over the exact
//! model, agreement, stage shares). Fields may be left empty (`hadamard:4096:12::0.995`).
//!
//! Run: `cargo run --release --example fashion_refine -- [OUT.json] [method:features:passes[:rate[:P]],...]`
//! (default `nystrom:1024:8,hadamard:4096:4`; benches/refine.sh runs `nystrom:1024:48:0.004,hadamard:4096:12:0.01:0.995`).

#[path = "common/fashion.rs"]
mod fashion;

use kernelpress::data::Standardizer;
use kernelpress::exact::{fit_svm, SmoOptions};
use kernelpress::features::{FeatureSpec, Landmarks, Method};
use kernelpress::fit::{guard_on_audit_rows, RefineOptions, RidgeGrid, Teacher};
use kernelpress::model::guarded::GuardTarget;
use kernelpress::model::{label_indices, CompiledModel, ExactModel};
use kernelpress::observe::Silent;
use kernelpress::report::{build_guarded, ReportOptions};
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

/// One run: method, features, passes, step size, guard target.
type Run = (String, usize, usize, Option<f64>, Option<f64>);

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().collect();
    let out = args
        .get(1)
        .cloned()
        .unwrap_or_else(|| "target/fashion/refine.json".into());
    let runs: Vec<Run> = args
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
                v.get(3)
                    .filter(|r| !r.is_empty())
                    .map(|r| r.parse().unwrap()),
                v.get(4)
                    .filter(|r| !r.is_empty())
                    .map(|r| r.parse().unwrap()),
            )
        })
        .collect();
    let (train, test) = fashion::load()?;
    std::fs::create_dir_all("target/fashion")?;
    // KP_FASHION_TEACHER=60000: the teacher trained on all 60,000 training images and
    // calibrated on those same images (the deployment case: no fresh rows are left).
    let images: usize = std::env::var("KP_FASHION_TEACHER")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10_000);
    if images != 10_000 && images != 60_000 {
        return Err("KP_FASHION_TEACHER must be 10000 or 60000".into());
    }
    let cache_name = format!("target/fashion/teacher{}k.safetensors", images / 1000);
    let cache = std::path::Path::new(&cache_name);
    let teacher: ExactModel = if cache.exists() {
        ExactModel::load(cache)?
    } else {
        let sub = train.x.slice(s![..images, ..]);
        let scaler = Standardizer::fit(sub);
        let xs = scaler.apply(sub);
        let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.0012755)".parse()?;
        let t0 = Instant::now();
        let svm = fit_svm(
            &kernel,
            xs.view(),
            &train.y[..images],
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
    let calib = if images == 60_000 {
        train.x.view()
    } else {
        train.x.slice(s![10_000..40_000, ..])
    };
    // The exact model's f32 single row (median of 200 test images), the yardstick of the
    // speed targets.
    let exact_us = {
        let mut t: Vec<f64> = Vec::new();
        for r in test.x.rows().into_iter().take(200) {
            let row = r.to_vec();
            let t0 = Instant::now();
            std::hint::black_box(teacher.decision_one_f32(&row));
            t.push(t0.elapsed().as_secs_f64() * 1e6);
        }
        t.sort_by(f64::total_cmp);
        t[t.len() / 2]
    };
    let td = teacher.decision(test.x.view());
    let want = label_indices(teacher.task(), teacher.labels().len(), td.view());
    let t = Teacher::new(&teacher, calib, &Silent)?;
    let grid = RidgeGrid::standard();
    let mut results = Vec::new();
    for (method, features, passes, rate, guard) in runs {
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
        // With a guard target: both models guarded at it (threshold chosen on the audit
        // calibration rows), measured on the test images (mean single-row speedup over
        // the mix of stages, agreement, share of rows sent to the exact model).
        let guarded = match guard {
            Some(p) => {
                let mut g = serde_json::Map::new();
                for (name, m) in [("before", &plain), ("after", &refined)] {
                    let gm = guard_on_audit_rows(
                        m.clone(),
                        &teacher,
                        calib,
                        GuardTarget::Agreement(p),
                        None,
                    )?;
                    let ropts = ReportOptions {
                        timing: true,
                        ..ReportOptions::default()
                    };
                    let rep = build_guarded(&gm, &teacher, test.x.view(), None, &ropts)?;
                    g.insert(
                        name.into(),
                        json!({"target": p, "agreement": rep.agreement,
                               "speedup_mean": rep.timing.speedup_mean,
                               "speedup_mean_f32": rep.timing.speedup_mean_f32,
                               "latency_us_exact_mean": rep.timing.latency_us_exact_mean,
                               "latency_us_guarded_mean": rep.timing.latency_us_compiled_mean,
                               "stage_shares": rep.stage_shares,
                               "rule": gm.guard_rule().describe()}),
                    );
                }
                Some(serde_json::Value::Object(g))
            }
            None => None,
        };
        let r = json!({
            "guarded": guarded,
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
        "teacher": {"images": images, "support_vectors": teacher.n_support_vectors(),
                    "single_row_f32_us": exact_us},
        "calibration": if images == 60_000 { "all 60,000 training images (the teacher's own)" } else { "training images 10,001–40,000" },
        "evaluated_on": "the 10,000 test images",
        "threads": rayon::current_num_threads(),
        "results": results,
    });
    std::fs::write(&out, serde_json::to_string_pretty(&doc)? + "\n")?;
    eprintln!("wrote {out}");
    Ok(())
}

//! Real-data benchmark on Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence; Debian
//! package `dataset-fashion-mnist`, IDX files in /usr/share/datasets/fashion-mnist/).
//!
//! Teacher: exact Gaussian C-SVM (γ = 1/784 on standardised pixels, C = 10) trained on the
//! first 10,000 training images (one-vs-one, 45 decision values); calibration: all 60,000
//! training images; evaluation: the 10,000 test images. For each method and feature count:
//! label agreement, accuracy of both models, decision RMSE, single-row and batched speedup,
//! bytes. A kernel-ridge teacher (one-vs-rest, λ = 1) is compared at D = 4096.
//!
//! Run: `cargo run --release --example fashion_bench -- [OUT.json] [D1,D2,...] [M1,M2,...] [uniform|kmeans++|leverage] [svm|ridge|both]`

#[path = "common/fashion.rs"]
mod fashion;

use kernelpress::data::Standardizer;
use kernelpress::exact::{fit_ridge, fit_svm, RidgeOptions, SmoOptions};
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
use kernelpress::model::ExactModel;
use kernelpress::report::{build, ReportOptions};
use ndarray::s;
use std::time::Instant;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().collect();
    let out = args
        .get(1)
        .cloned()
        .unwrap_or_else(|| "target/fashion/bench.json".into());
    let ds: Vec<usize> = args
        .get(2)
        .map(|s| s.split(',').map(|v| v.parse().unwrap()).collect())
        .unwrap_or(vec![1024, 2048, 4096, 8192]);
    let methods: Vec<Method> = args
        .get(3)
        .map(|s| s.split(',').map(|v| Method::parse(v).unwrap()).collect())
        .unwrap_or(vec![
            Method::Fourier,
            Method::Orthogonal,
            Method::Hadamard,
            Method::Fastfood,
            Method::Nystrom,
        ]);
    let rule = kernelpress::features::parse_landmarks(
        args.get(4).map(|s| s.as_str()).unwrap_or("uniform"),
    )?;
    let which = args.get(5).cloned().unwrap_or_else(|| "both".into());
    let (train, test) = fashion::load()?;
    let (xtr, ytr, xte, yte) = (train.x, train.y, test.x, test.y);
    std::fs::create_dir_all("target/fashion")?;
    let sub = xtr.slice(s![..10_000, ..]);
    let scaler = Standardizer::fit(sub);
    let xs = scaler.apply(sub);
    let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.0012755)".parse()?;
    let mut results = Vec::new();
    let teachers: Vec<(&str, ExactModel)> = {
        let t0 = Instant::now();
        let svm = fit_svm(
            &kernel,
            xs.view(),
            &ytr[..10_000],
            &SmoOptions {
                c: 10.0,
                ..Default::default()
            },
            Some(scaler.clone()),
            &kernelpress::observe::Silent,
        )?;
        eprintln!(
            "SVM teacher: {} SVs in {:.1} s",
            svm.n_support_vectors(),
            t0.elapsed().as_secs_f64()
        );
        let t0 = Instant::now();
        let mut ridge = fit_ridge(
            &kernel,
            xs.view(),
            &ytr[..10_000],
            &RidgeOptions {
                ridge: 1.0,
                classify: true,
            },
        )?;
        ridge = ExactModel::new(
            ridge.kernel().clone(),
            ridge.support_vectors().to_owned(),
            ridge.coef().to_owned(),
            ridge.intercept().to_vec(),
            ridge.task(),
            ridge.labels().to_vec(),
            Some(scaler.clone()),
        )?;
        eprintln!(
            "ridge teacher: {} rows in {:.1} s",
            ridge.n_support_vectors(),
            t0.elapsed().as_secs_f64()
        );
        vec![("svm", svm), ("ridge", ridge)]
    };
    for (tname, teacher) in &teachers {
        let te_dec = teacher.decision(xte.view());
        for &m in &methods {
            for &dd in &ds {
                if *tname == "ridge"
                    && (dd != 4096 || !(m == Method::Orthogonal || m == Method::Hadamard))
                {
                    continue;
                }
                let t0 = Instant::now();
                if which != "both" && which != *tname {
                    continue;
                }
                let mut spec = FeatureSpec::new(kernel.clone(), m, 784, dd, 1);
                spec.options.landmarks = rule;
                let grid = RidgeGrid {
                    relative: vec![1e-6, 1e-5, 1e-4, 1e-3, 1e-2],
                };
                let (model, _) = compile_exact(
                    teacher,
                    Some(xtr.view()),
                    &spec,
                    HeadKind::Distill,
                    &grid,
                    None,
                    &kernelpress::observe::Silent,
                )?;
                let fit_s = t0.elapsed().as_secs_f64();
                let opts = ReportOptions {
                    reps: 200,
                    ..Default::default()
                };
                let r = build(
                    &model,
                    teacher,
                    xte.view(),
                    Some(&yte),
                    Some(te_dec.clone()),
                    &opts,
                )?;
                let mut r = r.to_json();
                r["teacher"] = serde_json::json!(tname);
                r["landmark_rule"] =
                    serde_json::json!(args.get(4).cloned().unwrap_or_else(|| "uniform".into()));
                r["compile_seconds"] = serde_json::json!(fit_s);
                r["ridge_relative"] = model.fit["ridge_relative"].clone();
                eprintln!(
                    "{tname} {} D={dd}: agreement {:.4} acc {:.4}/{:.4} rmse {:.4} speedup {:.1}x/{:.1}x ({fit_s:.0} s)",
                    m.name(),
                    r["agreement"].as_f64().unwrap(),
                    r["accuracy_exact"].as_f64().unwrap(),
                    r["accuracy_compiled"].as_f64().unwrap(),
                    r["decision_rmse"].as_f64().unwrap(),
                    r["speedup_single"].as_f64().unwrap(),
                    r["speedup_batch"].as_f64().unwrap()
                );
                results.push(r);
                std::fs::write(&out, serde_json::to_string_pretty(&results)?)?;
            }
        }
    }
    Ok(())
}

//! The guard's trade-off: label agreement with the exact model against mean single-row
//! speedup, for fallback shares from 0 to 60% and for agreement targets, on evaluation rows
//! no part of the model saw. The compiled stage is distilled once; each threshold is chosen
//! on the calibration audit rows; each point's mean latency is measured on this machine.
//!
//! Run: `cargo run --release --example guard_curve -- MODEL CALIB.csv EVAL.csv TARGET METHOD D OUT_DIR`
//! Writes OUT_DIR/guard_curve.json and OUT_DIR/guard_curve.svg.

use kernelpress::data::read_for_model;
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{audit_row, RidgeGrid, Teacher};
use kernelpress::model::guarded::{confidence, threshold_for_agreement, threshold_for_rate};
use kernelpress::model::{label_indices, ExactModel, GuardedModel};
use kernelpress::observe::Silent;
use kernelpress::report::measure_single;
use ndarray::Axis;
use plotters::prelude::*;
use serde_json::json;
use std::path::Path;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let a: Vec<String> = std::env::args().collect();
    if a.len() != 8 {
        eprintln!("usage: guard_curve MODEL CALIB.csv EVAL.csv TARGET METHOD D OUT_DIR");
        std::process::exit(2);
    }
    let exact = ExactModel::load(Path::new(&a[1]))?;
    let calib = read_for_model(Path::new(&a[2]), Some(&a[4]), &exact.feature_names, false)?.table;
    let eval = read_for_model(Path::new(&a[3]), Some(&a[4]), &exact.feature_names, false)?.table;
    let out = Path::new(&a[7]);
    std::fs::create_dir_all(out)?;
    let teacher = Teacher::new(&exact, calib.x.view(), &Silent)?;
    let spec = FeatureSpec::new(
        exact.kernel().clone(),
        Method::parse(&a[5])?,
        exact.input_dim(),
        a[6].parse()?,
        0,
    );
    let (compact, _) = teacher.distil(&spec, &RidgeGrid::standard(), None, &Silent)?;
    let k = exact.labels().len();
    let task = exact.task();
    let idx: Vec<usize> = (0..calib.x.nrows()).filter(|&i| audit_row(i)).collect();
    let xa = calib.x.select(Axis(0), &idx);
    let sc_a = compact.decision(xa.view());
    let se_a = exact.decision(xa.view());
    let x = eval.x.view();
    let le = label_indices(task, k, exact.decision(x).view());
    let sc = compact.decision(x);
    let lc = label_indices(task, k, sc.view());
    let conf = confidence(task, k, sc.view());
    let reps = 600;
    let exact_mean = measure_single(x, reps, |r| exact.decision_one(r)).mean_us;
    let mut points = Vec::new();
    let mut run = |label: String, t: f64| -> Result<(), Box<dyn std::error::Error>> {
        let g = GuardedModel::new(compact.clone(), exact.clone(), t)?;
        let n = le.len();
        let fallback: Vec<bool> = conf.iter().map(|c| *c < t).collect();
        let agree = (0..n).filter(|&i| fallback[i] || lc[i] == le[i]).count() as f64 / n as f64;
        let share = fallback.iter().filter(|f| **f).count() as f64 / n as f64;
        let mean = measure_single(x, reps, |r| g.decision_one(r).0).mean_us;
        eprintln!(
            "{label}: fallback {:.1}%, agreement {agree:.4}, mean {mean:.1} µs, speedup {:.2}×",
            100.0 * share,
            exact_mean / mean
        );
        points.push(json!({
            "setting": label, "threshold": if t.is_finite() { json!(t) } else { json!(t.to_string()) },
            "fallback_share": share, "agreement": agree,
            "latency_us_mean": mean, "speedup_mean": exact_mean / mean,
        }));
        Ok(())
    };
    for r in [0.0, 0.02, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4, 0.6] {
        run(
            format!("rate {r}"),
            threshold_for_rate(task, k, sc_a.view(), r),
        )?;
    }
    for p in [0.99, 0.995, 0.999] {
        if let Some((t, _)) = threshold_for_agreement(task, k, sc_a.view(), se_a.view(), p) {
            run(format!("target {p}"), t)?;
        }
    }
    let doc = json!({
        "model": a[1], "calib_rows": calib.x.nrows(), "audit_rows": idx.len(),
        "eval_rows": x.nrows(), "method": a[5], "features": compact.features(),
        "exact_latency_us_mean": exact_mean, "points": points,
    });
    std::fs::write(
        out.join("guard_curve.json"),
        serde_json::to_string_pretty(&doc)?,
    )?;
    // The picture: agreement against mean speedup, one point per fallback share.
    let pts: Vec<(f64, f64, String)> = doc["points"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|p| p["setting"].as_str().unwrap().starts_with("rate"))
        .map(|p| {
            (
                p["speedup_mean"].as_f64().unwrap(),
                p["agreement"].as_f64().unwrap(),
                format!("{:.0}%", 100.0 * p["fallback_share"].as_f64().unwrap()),
            )
        })
        .collect();
    let xmax = pts.iter().map(|p| p.0).fold(1.0f64, f64::max) * 1.15;
    let ymin = pts.iter().map(|p| p.1).fold(1.0f64, f64::min) - 0.005;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (760, 460)).into_drawing_area();
        root.fill(&WHITE)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!(
                    "guarded {} ({} features): agreement against mean speedup",
                    a[5],
                    compact.features()
                ),
                ("sans-serif", 17),
            )
            .margin(14)
            .x_label_area_size(42)
            .y_label_area_size(64)
            .build_cartesian_2d(0.8f64..xmax, ymin..1.0005f64)?;
        chart
            .configure_mesh()
            .x_desc("mean single-row speedup over the exact model (×)")
            .y_desc("agreement with the exact model")
            .y_label_formatter(&|v| format!("{v:.3}"))
            .draw()?;
        let blue = RGBColor(0, 114, 178);
        chart.draw_series(LineSeries::new(
            pts.iter().map(|p| (p.0, p.1)),
            blue.stroke_width(2),
        ))?;
        chart.draw_series(pts.iter().map(|p| {
            EmptyElement::at((p.0, p.1))
                + Circle::new((0, 0), 4, blue.filled())
                + Text::new(p.2.clone(), (6, -14), ("sans-serif", 11).into_font())
        }))?;
        root.present()?;
    }
    std::fs::write(out.join("guard_curve.svg"), svg)?;
    eprintln!("wrote {}", out.display());
    Ok(())
}

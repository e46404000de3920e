//! The guard's trade-off: label agreement with the exact model against mean single-row
//! speedup, for both guard rules (`row`: the exact model answers the least confident rows
//! whole; `pairs`, one-vs-one models: it recomputes the uncertain class pairs of the
//! classes that could still win, from those pairs' support vectors), for shares of rows
//! from 0 to 60% and for agreement targets, on evaluation rows no part of the model saw.
//! The compiled stage is distilled once; each threshold is chosen on the calibration audit
//! rows; each point's mean latency is measured on this machine, the exact model's mean
//! again beside every point (the machine's speed drifts).
//!
//! Run: `cargo run --release --example guard_curve -- MODEL CALIB.csv EVAL.csv TARGET METHOD D OUT_DIR`
//! Writes OUT_DIR/guard_curve.json and OUT_DIR/guard_curve.svg.

use kernelpress::data::read_for_model;
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{audit_row, RidgeGrid, Teacher};
use kernelpress::model::guarded::{choose_guard, GuardRule, GuardTarget, STAGES};
use kernelpress::model::{label_indices, ExactModel, GuardedModel, Task};
use kernelpress::observe::Silent;
use kernelpress::report::measure_single;
use ndarray::Axis;
use plotters::prelude::*;
use serde_json::json;
use std::path::Path;

/// A point of the picture: mean speedup, agreement, label.
type Point = (f64, f64, String);

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
    let reps = 600;
    let mut exact_means = Vec::new();
    let mut points = Vec::new();
    let mut run = |rule: GuardRule,
                   label: String,
                   t: f64|
     -> Result<(), Box<dyn std::error::Error>> {
        let g = GuardedModel::with_rule(compact.clone(), exact.clone(), t, rule)?;
        let n = le.len();
        let (sg, stage) = g.decision(x);
        let lg = label_indices(task, k, sg.view());
        let agree = (0..n).filter(|&i| lg[i] == le[i]).count() as f64 / n as f64;
        let share = stage.iter().filter(|&&s| s != 0).count() as f64 / n as f64;
        let work = g.exact_work_share(x);
        let mean = measure_single(x, reps, |r| g.decision_one(r).0).mean_us;
        let exact_mean = measure_single(x, reps / 2, |r| exact.decision_one(r)).mean_us;
        exact_means.push(exact_mean);
        let rname = match rule {
            GuardRule::Row => "row",
            GuardRule::Pairs => "pairs",
        };
        eprintln!(
            "{rname} {label}: exact in {:.1}% of rows, {:.1}% of its work, agreement {agree:.4}, mean {mean:.1} µs (exact {exact_mean:.0} µs), speedup {:.2}×",
            100.0 * share,
            100.0 * work,
            exact_mean / mean
        );
        let shares: Vec<f64> = (0..STAGES.len())
            .map(|s| stage.iter().filter(|&&v| v as usize == s).count() as f64 / n as f64)
            .collect();
        points.push(json!({
            "rule": rname, "setting": label,
            "threshold": if t.is_finite() { json!(t) } else { json!(t.to_string()) },
            "fallback_share": share, "exact_work_share": work, "stage_shares": shares,
            "agreement": agree, "latency_us_mean": mean, "exact_latency_us_mean": exact_mean,
            "speedup_mean": exact_mean / mean,
        }));
        Ok(())
    };
    let mut rules = vec![GuardRule::Row];
    if task == Task::Ovo {
        rules.push(GuardRule::Pairs);
    }
    for &rule in &rules {
        for r in [0.0, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4, 0.6] {
            let c = choose_guard(&exact, rule, sc_a.view(), se_a.view(), GuardTarget::Rate(r))
                .expect("a rate always has a threshold");
            run(rule, format!("rate {r}"), c.threshold)?;
        }
        for p in [0.99, 0.995, 0.999] {
            if let Some(c) = choose_guard(
                &exact,
                rule,
                sc_a.view(),
                se_a.view(),
                GuardTarget::Agreement(p),
            ) {
                run(rule, format!("target {p}"), c.threshold)?;
            }
        }
    }
    let exact_mean = exact_means.iter().sum::<f64>() / exact_means.len() as f64;
    let doc = json!({
        "model": a[1], "calib_rows": calib.x.nrows(), "audit_rows": idx.len(),
        "eval_rows": x.nrows(), "method": a[5], "features": compact.features(),
        "exact_latency_us_mean_overall": exact_mean, "points": points,
    });
    std::fs::write(
        out.join("guard_curve.json"),
        serde_json::to_string_pretty(&doc)?,
    )?;
    // The picture: agreement against mean speedup, one line per rule, one point per
    // share of rows the exact model takes part in.
    let series: Vec<(String, Vec<Point>)> = ["row", "pairs"]
        .iter()
        .map(|rule| {
            let pts = doc["points"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|p| {
                    p["rule"] == *rule && p["setting"].as_str().unwrap().starts_with("rate")
                })
                .map(|p| {
                    (
                        p["speedup_mean"].as_f64().unwrap(),
                        p["agreement"].as_f64().unwrap(),
                        format!("{:.0}%", 100.0 * p["fallback_share"].as_f64().unwrap()),
                    )
                })
                .collect::<Vec<_>>();
            (rule.to_string(), pts)
        })
        .filter(|(_, p)| !p.is_empty())
        .collect();
    let pts: Vec<Point> = series.iter().flat_map(|s| s.1.clone()).collect();
    let xmax = pts.iter().map(|p| p.0).fold(1.0f64, f64::max) * 1.15;
    let ymin = pts.iter().map(|p| p.1).fold(1.0f64, f64::min) - 0.005;
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (760, 460)).into_drawing_area();
        root.fill(&WHITE)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!(
                    "guarded {} ({} features): agreement against mean speedup (labels: rows the exact model takes part in)",
                    a[5],
                    compact.features()
                ),
                ("sans-serif", 17),
            )
            .margin(14)
            .x_label_area_size(42)
            .y_label_area_size(64)
            .build_cartesian_2d((0.8f64..xmax).log_scale(), ymin..1.0005f64)?;
        chart
            .configure_mesh()
            .x_desc("mean single-row speedup over the exact model (×, log scale)")
            .y_desc("agreement with the exact model")
            .y_label_formatter(&|v| format!("{v:.3}"))
            .draw()?;
        let colours = [RGBColor(0, 114, 178), RGBColor(213, 94, 0)];
        for ((name, pts), colour) in series.iter().zip(colours) {
            let label = match name.as_str() {
                "row" => "row rule: the exact model answers whole rows",
                _ => "pairs rule: the exact model recomputes uncertain pairs",
            };
            chart
                .draw_series(LineSeries::new(
                    pts.iter().map(|p| (p.0, p.1)),
                    colour.stroke_width(2),
                ))?
                .label(label)
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2))
                });
            chart.draw_series(pts.iter().map(|p| {
                EmptyElement::at((p.0, p.1))
                    + Circle::new((0, 0), 4, colour.filled())
                    + Text::new(p.2.clone(), (6, -14), ("sans-serif", 11).into_font())
            }))?;
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::LowerLeft)
            .background_style(WHITE.mix(0.9))
            .border_style(BLACK.mix(0.3))
            .label_font(("sans-serif", 13))
            .draw()?;
        root.present()?;
    }
    std::fs::write(out.join("guard_curve.svg"), svg)?;
    eprintln!("wrote {}", out.display());
    Ok(())
}

//! `kernelpress sweep`: compile every (method, feature count) pair, measure each against
//! the exact model on evaluation data, and write `sweep.json`, `sweep.svg` and
//! `report.html` into a folder.

use super::progress;
use kernelpress::choose::{
    estimate_sweep_seconds, recommend, render_page, render_svg, run_sweep, SweepOptions,
};
use kernelpress::data::write_all_atomic;
use kernelpress::fit::{RidgeGrid, Teacher};
use kernelpress::model::ExactModel;
use kernelpress::report::ReportOptions;
use kernelpress::{Error, Result};
use serde_json::json;
use std::path::PathBuf;

/// Compile every pair of --methods × --features and compare them on --eval.
///
/// Writes DIR/sweep.json (one record per pair with every report key, plus the exact model),
/// DIR/sweep.svg (disagreement against single-row latency) and DIR/report.html (a page with
/// the picture, the table, the recommendation and the cautions; no scripts, no network).
///
/// Example:
///   kernelpress sweep models/pump_svm.safetensors --calib models/pump_calib.csv
///       --eval models/pump_test.csv --target condition --methods fourier,hadamard,nystrom
///       --features 128,256,512,1024 --out pump_sweep
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Exact model file.
    model: PathBuf,
    /// Calibration inputs (CSV or .npy), shared by every candidate.
    #[arg(long)]
    calib: PathBuf,
    /// Evaluation data every candidate is judged on (never fitted on).
    #[arg(long)]
    eval: PathBuf,
    /// Label column of the evaluation data (ignored as a feature; used for accuracy).
    #[arg(long)]
    target: Option<String>,
    /// Methods, comma-separated (default: every method for the kernel but identity).
    #[arg(long, value_delimiter = ',')]
    methods: Vec<String>,
    /// Feature counts, comma-separated.
    #[arg(long, value_delimiter = ',', default_value = "256,512,1024,2048,4096")]
    features: Vec<usize>,
    /// Seed of every map.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// The agreement the recommendation must reach (classifiers; regression: the relative
    /// decision RMSE must stay below 1 − P).
    #[arg(long, default_value_t = 0.99)]
    min_agreement: f64,
    /// Also plot each candidate guarded by the exact model (classifiers): the threshold
    /// that keeps agreement at least P on the calibration audit rows (one-sided 95%
    /// bound); its point is placed at the mean single-row latency.
    #[arg(long)]
    guard_agreement: Option<f64>,
    /// Measure this machine again instead of using the cached profile.
    #[arg(long)]
    recalibrate: bool,
    /// Take data columns in file order instead of matching the model's column names.
    #[arg(long)]
    by_position: bool,
    /// Output folder (created if missing; its parent must exist).
    #[arg(long)]
    out: PathBuf,
}

pub(crate) fn run(a: Args) -> Result<()> {
    if !(0.0..=1.0).contains(&a.min_agreement) {
        return Err(Error::input(format!(
            "--min-agreement {} must be between 0 and 1",
            a.min_agreement
        )));
    }
    if let Some(p) = a.guard_agreement {
        if !(p > 0.0 && p < 1.0) {
            return Err(Error::input(format!(
                "--guard-agreement {p} must be in (0, 1)"
            )));
        }
    }
    if a.features.iter().any(|&f| f == 0 || f > 1 << 20) {
        return Err(Error::input(
            "--features: every count must be between 1 and 1048576",
        ));
    }
    if a.features.len() > 64 || a.methods.len() > 32 {
        return Err(Error::input(
            "a sweep takes at most 32 methods and 64 feature counts",
        ));
    }
    let files = ["sweep.json", "sweep.svg", "report.html"].map(|f| a.out.join(f));
    {
        let ins = [a.model.as_path(), a.calib.as_path(), a.eval.as_path()];
        if a.out.exists() && !a.out.is_dir() {
            return Err(Error::input(format!(
                "{}: exists and is not a folder",
                a.out.display()
            )));
        }
        let outs: Vec<(&std::path::Path, bool)> = vec![(a.out.as_path(), true)];
        super::guard_outputs(&ins, &outs)?;
    }
    let exact = ExactModel::load(&a.model)?;
    super::note_unverified(&a.model);
    let kernel = exact.kernel().clone();
    let methods = super::methods_arg(&a.methods, &kernel)?;
    let calib = super::read_for(
        &a.calib,
        a.target.as_deref(),
        &exact.feature_names,
        a.by_position,
    )?;
    let eval = super::read_for(
        &a.eval,
        a.target.as_deref(),
        &exact.feature_names,
        a.by_position,
    )?;
    let profile = super::machine::profile(a.recalibrate)?;
    let bars = progress::Bars::default();
    let teacher = Teacher::new(&exact, calib.x.view(), &bars)?;
    let opts = SweepOptions {
        methods,
        features: a.features.clone(),
        seed: a.seed,
        grid: RidgeGrid::standard(),
        report: ReportOptions {
            min_agreement: a.min_agreement,
            ..ReportOptions::default()
        },
        guard_agreement: a.guard_agreement,
    };
    let estimate = estimate_sweep_seconds(
        calib.x.nrows(),
        exact.input_dim(),
        exact.n_outputs(),
        &opts.features,
        opts.methods.len(),
        &opts.grid,
        &profile,
        rayon::current_num_threads(),
    );
    progress::note(format!(
        "{} candidates; the cost model estimates their distillation at about {} on {} threads (the timing of each candidate comes on top)",
        opts.features.len() * opts.methods.len(),
        human_seconds(estimate),
        rayon::current_num_threads()
    ));
    let started = std::time::Instant::now();
    let s = run_sweep(
        &teacher,
        eval.x.view(),
        eval.target.as_deref(),
        &profile,
        &opts,
        &bars,
    )?;
    progress::note(format!(
        "sweep took {} (estimated {} for the distillations)",
        human_seconds(started.elapsed().as_secs_f64()),
        human_seconds(estimate)
    ));
    for (m, f, why) in &s.skipped {
        progress::warn(format!("{m} at {f} features was not built: {why}"));
    }
    let svg = render_svg(&s, 900, 560)?;
    let max_loss = 1.0 - a.min_agreement;
    let context = vec![
        format!(
            "exact model {} ({} support vectors, kernel {}, {} output{})",
            a.model.display(),
            exact.n_support_vectors(),
            kernel,
            exact.n_outputs(),
            if exact.n_outputs() == 1 { "" } else { "s" }
        ),
        format!(
            "calibration {} ({} rows); evaluation {} ({} rows)",
            a.calib.display(),
            calib.x.nrows(),
            a.eval.display(),
            eval.x.nrows()
        ),
        format!(
            "measured on {} with {} threads; memory bandwidth {:.1} GB/s (largest working set)",
            profile.cpu,
            rayon::current_num_threads(),
            profile
                .bandwidth_gbps
                .last()
                .map(|b| b[1])
                .unwrap_or(f64::NAN)
        ),
    ];
    let title = a
        .model
        .file_name()
        .map(|f| f.to_string_lossy().to_string())
        .unwrap_or_default();
    let page = render_page(&s, &svg, &title, max_loss, &context);
    let rec = recommend(&s.records, max_loss);
    let doc = json!({
        "model": a.model.display().to_string(),
        "calib_rows": calib.x.nrows(),
        "eval_rows": eval.x.nrows(),
        "loss": s.loss_name,
        "min_agreement": a.min_agreement,
        "machine": serde_json::to_value(&profile).unwrap_or_default(),
        "recommended": rec.map(|(i, meets)| json!({
            "method": s.records[i].method,
            "features": s.records[i].features,
            "meets_min_agreement": meets,
        })),
        "skipped": s.skipped.iter().map(|(m, f, w)| json!({"method": m, "features": f, "why": w})).collect::<Vec<_>>(),
        "records": s.records.iter().map(|r| r.to_json()).collect::<Vec<_>>(),
    });
    let json_text = format!(
        "{}\n",
        serde_json::to_string_pretty(&doc).unwrap_or_default()
    );
    std::fs::create_dir_all(&a.out).map_err(|e| {
        Error::input(format!(
            "{}: cannot create the folder: {e}",
            a.out.display()
        ))
    })?;
    write_all_atomic(&[
        (files[0].as_path(), json_text.as_bytes()),
        (files[1].as_path(), svg.as_bytes()),
        (files[2].as_path(), page.as_bytes()),
    ])?;
    let mut text = String::new();
    text.push_str(&format!(
        "{:<12} {:>8} {:>12} {:>12} {:>14} {:>10}\n",
        "method",
        "features",
        s.loss_name.split(' ').next().unwrap_or("loss"),
        "p50 (µs)",
        "predicted (µs)",
        "front"
    ));
    for r in &s.records {
        text.push_str(&format!(
            "{:<12} {:>8} {:>12.4} {:>12.2} {:>14.2} {:>10}\n",
            r.method,
            r.features,
            r.loss,
            r.latency_us,
            r.predicted.latency_us,
            if r.pareto { "yes" } else { "" }
        ));
    }
    match rec {
        Some((i, true)) if s.records[i].exact => text.push_str(
            "recommended: keep the exact model (no compiled candidate within the tolerance is faster)\n",
        ),
        Some((i, meets)) => text.push_str(&format!(
            "recommended: {} with {} features{}\n",
            s.records[i].method,
            s.records[i].features,
            if meets { "" } else { " (the most faithful; it does not reach --min-agreement)" }
        )),
        None => {}
    }
    text.push_str(&format!(
        "wrote {}, {} and {}\n",
        files[0].display(),
        files[1].display(),
        files[2].display()
    ));
    super::print_stdout(&text)
}

/// Seconds as a person reads them: "2.5 s", "40 s", "3.5 min", "1.2 h".
fn human_seconds(t: f64) -> String {
    if t < 10.0 {
        format!("{t:.1} s")
    } else if t < 90.0 {
        format!("{t:.0} s")
    } else if t < 5400.0 {
        format!("{:.1} min", t / 60.0)
    } else {
        format!("{:.1} h", t / 3600.0)
    }
}

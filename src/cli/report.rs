//! `kernelpress report`: compiled vs exact on a dataset → error report.

use kernelpress::data::{check_batch, read_table, write_atomic};
use kernelpress::model::{CompiledModel, ExactModel};
use kernelpress::report::{self, ReportOptions};
use kernelpress::{Error, Result};
use std::path::PathBuf;

/// Compare a compiled model with its exact model on a dataset.
///
/// Prints a table (or JSON with --json); latencies are measured on this machine. Warns on
/// stderr when label agreement is below --min-agreement.
///
/// Example:
///   kernelpress report pump_compiled.safetensors --exact models/pump_svm.safetensors
///       --data models/pump_test.csv --target condition --json report.json
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Compiled model file.
    compiled: PathBuf,
    /// The exact model it approximates.
    #[arg(long)]
    exact: PathBuf,
    /// Evaluation data (CSV or .npy).
    #[arg(long)]
    data: PathBuf,
    /// Target column (true labels, for accuracy).
    #[arg(long)]
    target: Option<String>,
    /// Write JSON to this file; with no value, print JSON on stdout instead of the table.
    #[arg(long, num_args = 0..=1, default_missing_value = "-")]
    json: Option<String>,
    /// Warn when label agreement falls below this.
    #[arg(long, default_value_t = 0.99)]
    min_agreement: f64,
    /// Skip latency measurements.
    #[arg(long)]
    no_timing: bool,
    /// Single-row repetitions for the latency measurement.
    #[arg(long, default_value_t = 300)]
    reps: usize,
}

pub(crate) fn run(a: Args) -> Result<()> {
    let c = CompiledModel::load(&a.compiled)?;
    let e = ExactModel::load(&a.exact)?;
    if c.input_dim() != e.input_dim()
        || c.n_outputs() != e.n_outputs()
        || c.labels() != e.labels()
        || c.task() != e.task()
    {
        return Err(Error::input(format!(
            "{} does not match {}: input dim {} vs {}, outputs {} vs {}, task {} vs {}",
            a.compiled.display(),
            a.exact.display(),
            c.input_dim(),
            e.input_dim(),
            c.n_outputs(),
            e.n_outputs(),
            c.task().name(),
            e.task().name()
        )));
    }
    if !(0.0..=1.0).contains(&a.min_agreement) {
        return Err(Error::input("--min-agreement must be between 0 and 1"));
    }
    let t = read_table(&a.data, a.target.as_deref(), false)?;
    check_batch(t.x.view(), e.input_dim(), &a.data.display().to_string())?;
    let opts = ReportOptions {
        min_agreement: a.min_agreement,
        timing: !a.no_timing,
        reps: a.reps.max(1),
        ..ReportOptions::default()
    };
    let mut r = report::build(&c, &e, t.x.view(), t.target.as_deref(), None, &opts)?;
    r.evaluated_on = Some(a.data.display().to_string());
    for w in &r.warnings {
        super::progress::warn(w);
    }
    let pretty = format!("{}\n", serde_json::to_string_pretty(&r).unwrap());
    match a.json.as_deref() {
        Some("-") => super::print_stdout(&pretty),
        Some(p) => {
            write_atomic(std::path::Path::new(p), pretty.as_bytes())?;
            super::print_stdout(&report::render_text(&r))
        }
        None => super::print_stdout(&report::render_text(&r)),
    }
}

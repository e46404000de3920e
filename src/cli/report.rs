//! `kernelpress report`: compiled vs exact on a dataset → error report.

use kernelpress::data::write_atomic;
use kernelpress::model::ExactModel;
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
    /// Take the data columns in file order instead of matching the model's column names.
    #[arg(long)]
    by_position: bool,
    /// Write JSON to this file; with no value, print JSON on stdout instead of the table.
    #[arg(long, num_args = 0..=1, default_missing_value = "-")]
    json: Option<String>,
    #[command(flatten)]
    gate: super::GateArgs,
    /// Compare even when the compiled file records a different exact model.
    #[arg(long)]
    any_exact: bool,
    /// Skip latency measurements.
    #[arg(long)]
    no_timing: bool,
    /// Single-row repetitions for the latency measurement.
    #[arg(long, default_value_t = 300)]
    reps: usize,
}

pub(crate) fn run(a: Args) -> Result<()> {
    if !(1..=100_000).contains(&a.reps) {
        return Err(Error::input(format!(
            "--reps {} must be from 1 to 100000",
            a.reps
        )));
    }
    if let Some(j) = a.json.as_deref().filter(|j| *j != "-") {
        super::guard_outputs(
            &[&a.compiled, &a.exact, &a.data],
            &[(std::path::Path::new(j), false)],
        )?;
    }
    let (any, _) = kernelpress::model::AnyModel::load(&a.compiled)?;
    let (c, guarded) = match any {
        kernelpress::model::AnyModel::Compiled(c) => (c, None),
        kernelpress::model::AnyModel::Guarded(g) => (g.compact().clone(), Some(g)),
        kernelpress::model::AnyModel::Exact(_) => {
            return Err(Error::input(format!(
                "{}: model kind is 'exact'; expected a compiled model (or a guarded one) to compare with the exact model",
                a.compiled.display()
            )))
        }
    };
    let e = ExactModel::load(&a.exact)?;
    super::note_unverified(&a.compiled);
    super::note_unverified(&a.exact);
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
    a.gate.validate()?;
    match &c.exact_fingerprint {
        Some(f) if *f != e.fingerprint() && !a.any_exact => {
            return Err(Error::input(format!(
                "{} was compiled from a different exact model (fingerprint {f}; {} has {}); pass --any-exact to compare anyway",
                a.compiled.display(),
                a.exact.display(),
                e.fingerprint()
            )))
        }
        None => super::progress::note(format!(
            "{} records no exact model (compiled from labels or by an older version); cannot check it came from {}",
            a.compiled.display(),
            a.exact.display()
        )),
        _ => {}
    }
    let t = super::read_for(
        &a.data,
        a.target.as_deref(),
        &c.feature_names,
        a.by_position,
    )?;
    let opts = ReportOptions {
        min_agreement: a.gate.tolerance(),
        timing: !a.no_timing,
        reps: a.reps,
        ..ReportOptions::default()
    };
    let mut r = match &guarded {
        Some(g) => report::build_guarded(g, &e, t.x.view(), t.target.as_deref(), &opts)?,
        None => report::build(&c, &e, t.x.view(), t.target.as_deref(), None, &opts)?,
    };
    r.evaluated_on = Some(a.data.display().to_string());
    for w in &r.warnings {
        super::progress::warn(w);
    }
    let gate = a.gate.failure(&r)?;
    let pretty = format!("{}\n", serde_json::to_string_pretty(&r).unwrap());
    match a.json.as_deref() {
        Some("-") => super::print_stdout(&pretty)?,
        Some(p) => {
            write_atomic(std::path::Path::new(p), pretty.as_bytes())?;
            super::print_stdout(&report::render_text(&r))?
        }
        None => super::print_stdout(&report::render_text(&r))?,
    }
    match gate {
        Some(why) => Err(Error::new(kernelpress::ErrorKind::Gate, why)),
        None => Ok(()),
    }
}

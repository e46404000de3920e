//! `kernelpress import`: plain arrays → native exact model file.

use kernelpress::data::read_npy;
use kernelpress::model::{ExactModel, Task};
use kernelpress::{Error, Result};
use std::path::PathBuf;

/// Import an exact model from arrays (.npy support vectors and coefficients).
///
/// The decision function is f_j(x) = Σ_i coef[i, j] · k(x, sv_i) + intercept_j.
/// Task defaults: regression without labels; binary for 2 labels and one column;
/// ovr when there is one column per label; ovo for k(k−1)/2 columns.
///
/// Example:
///   kernelpress import --support-vectors sv.npy --coef coef.npy --intercept 0.25
///       --kernel 'gaussian(gamma=0.5)' --labels ok,worn --out model.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Support vectors, n_sv × d float array (.npy).
    #[arg(long)]
    support_vectors: PathBuf,
    /// Coefficients, n_sv (one output) or n_sv × k (.npy).
    #[arg(long)]
    coef: PathBuf,
    /// Intercepts, comma-separated, one per output.
    #[arg(long, allow_hyphen_values = true)]
    intercept: String,
    /// Kernel expression.
    #[arg(long)]
    kernel: String,
    /// regression, binary, ovr or ovo (default: inferred from labels and columns).
    #[arg(long)]
    task: Option<String>,
    /// Class labels, comma-separated, in class-index order.
    #[arg(long)]
    labels: Option<String>,
    /// Output model file.
    #[arg(long)]
    out: PathBuf,
}

pub(crate) fn run(a: Args) -> Result<()> {
    let kernel = super::kernel_arg(&a.kernel)?;
    let sv_src = a.support_vectors.display().to_string();
    let sv = read_npy(&a.support_vectors)?.into_2d(&sv_src)?;
    let coef_src = a.coef.display().to_string();
    let coef = read_npy(&a.coef)?.into_2d(&coef_src)?;
    if coef.nrows() != sv.nrows() {
        return Err(Error::input(format!(
            "{coef_src}: has {} rows but {sv_src} has {} support vectors",
            coef.nrows(),
            sv.nrows()
        )));
    }
    let intercept: Vec<f64> = a
        .intercept
        .split(',')
        .map(|s| {
            s.trim()
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| Error::input(format!("--intercept: '{s}' is not a finite number")))
        })
        .collect::<Result<_>>()?;
    let labels: Vec<String> = a
        .labels
        .as_deref()
        .map(|l| l.split(',').map(|s| s.trim().to_string()).collect())
        .unwrap_or_default();
    let k = coef.ncols();
    let task = match a.task.as_deref() {
        Some(t) => Task::parse(t)?,
        None if labels.is_empty() => Task::Regression,
        None if labels.len() == 2 && k == 1 => Task::Binary,
        None if labels.len() == k => Task::Ovr,
        None if labels.len() * (labels.len() - 1) / 2 == k => Task::Ovo,
        None => {
            return Err(Error::input(format!(
                "cannot infer the task from {} labels and {k} coefficient columns; pass --task",
                labels.len()
            )))
        }
    };
    kernelpress::data::check_batch(sv.view(), sv.ncols(), &sv_src)?;
    let mut m = ExactModel::new(kernel, sv, coef, intercept, task, labels, None)?;
    m.training = serde_json::json!({ "model": "imported", "from": "arrays" });
    m.save(&a.out)?;
    super::print_stdout(&format!(
        "imported {} support vectors ({} task, {} outputs); wrote {}\n",
        m.n_support_vectors(),
        m.task().name(),
        m.n_outputs(),
        a.out.display()
    ))
}

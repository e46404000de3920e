//! `kernelpress import`: plain arrays → native exact model file.

use kernelpress::data::read_npy;
use kernelpress::model::{ExactModel, Task};
use kernelpress::{Error, Result};
use std::path::PathBuf;

/// Import an exact model from an ONNX SVM, or from arrays (.npy support vectors and
/// coefficients).
///
/// --onnx reads an ONNX-ML SVMClassifier or SVMRegressor (kernel LINEAR, POLY, RBF or
/// SIGMOID; 2 or more classes, int or string labels), optionally after a Scaler, which
/// becomes the model's input scaling. A 2-class SVM keeps ONNX's decision value s (the
/// first class when s > 0) and lists its labels as (second, first), so that `score`'s rule
/// "positive means the second label" gives the same labels. Probability outputs and post
/// transforms other than NONE are refused.
///
/// From arrays, the decision function is f_j(x) = Σ_i coef[i, j] · k(x, sv_i) + intercept_j.
/// Task defaults: regression without labels; binary for 2 labels and one column;
/// ovr when there is one column per label; ovo for k(k−1)/2 columns.
///
/// Examples:
///   kernelpress import --onnx svm.onnx --out model.safetensors
///   kernelpress import --support-vectors sv.npy --coef coef.npy --intercept 0.25
///       --kernel 'gaussian(gamma=0.5)' --labels ok,worn --out model.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// An ONNX model holding an SVM (instead of the arrays).
    #[arg(long, conflicts_with_all = ["support_vectors", "coef", "intercept", "kernel", "task", "labels"])]
    onnx: Option<PathBuf>,
    /// Support vectors, n_sv × d float array (.npy).
    #[arg(long, required_unless_present = "onnx")]
    support_vectors: Option<PathBuf>,
    /// Coefficients, n_sv (one output) or n_sv × k (.npy).
    #[arg(long, required_unless_present = "onnx")]
    coef: Option<PathBuf>,
    /// Intercepts, comma-separated, one per output.
    #[arg(long, allow_hyphen_values = true, required_unless_present = "onnx")]
    intercept: Option<String>,
    /// Kernel expression.
    #[arg(long, required_unless_present = "onnx")]
    kernel: Option<String>,
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
    {
        let ins: Vec<&std::path::Path> = [&a.onnx, &a.support_vectors, &a.coef]
            .into_iter()
            .flatten()
            .map(|p| p.as_path())
            .collect();
        super::guard_outputs(&ins, &[(&a.out, false)])?;
    }
    if let Some(p) = &a.onnx {
        let m = kernelpress::export::onnx::svm::import_svm(p)?;
        m.save(&a.out)?;
        return super::print_stdout(&format!(
            "imported {} from {}: {} support vectors, kernel {}, {} task, {} output{}{}; wrote {}\n",
            m.training["operator"].as_str().unwrap_or("SVM"),
            p.display(),
            m.n_support_vectors(),
            m.kernel(),
            m.task().name(),
            m.n_outputs(),
            if m.n_outputs() == 1 { "" } else { "s" },
            if m.scaling().is_some() {
                ", input scaling from the Scaler"
            } else {
                ""
            },
            a.out.display()
        ));
    }
    let (Some(svp), Some(cp), Some(ic), Some(ks)) =
        (&a.support_vectors, &a.coef, &a.intercept, &a.kernel)
    else {
        return Err(Error::input(
            "give --onnx FILE, or --support-vectors, --coef, --intercept and --kernel",
        ));
    };
    let kernel = super::kernel_arg(ks)?;
    let sv_src = svp.display().to_string();
    let sv = read_npy(svp)?.into_2d(&sv_src)?;
    let coef_src = cp.display().to_string();
    let coef = read_npy(cp)?.into_2d(&coef_src)?;
    if coef.nrows() != sv.nrows() {
        return Err(Error::input(format!(
            "{coef_src}: has {} rows but {sv_src} has {} support vectors",
            coef.nrows(),
            sv.nrows()
        )));
    }
    let intercept: Vec<f64> = ic
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
        None => Task::infer(labels.len(), k)
            .map_err(|e| Error::input(format!("{}; pass --task", e.message())))?,
    };
    kernelpress::data::check_batch(sv.view(), sv.ncols(), &sv_src)?;
    let mut m = ExactModel::new(kernel, sv, coef, intercept, task, labels, None)?;
    m.training = serde_json::json!({ "model": "imported", "from": "arrays" });
    m.save(&a.out)?;
    super::print_stdout(&format!(
        "imported {} support vectors ({} task, {} output{}); wrote {}\n",
        m.n_support_vectors(),
        m.task().name(),
        m.n_outputs(),
        if m.n_outputs() == 1 { "" } else { "s" },
        a.out.display()
    ))
}

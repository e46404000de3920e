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
/// "positive means the second label" gives the same labels. Pairwise probability sigmoids
/// (`prob_a`, `prob_b`) are kept for `score --probabilities`; post transforms other than
/// NONE are refused.
///
/// From arrays, output j's decision is f_j(x) = Σ_i W[i, j] · k(s(x), sv_i) + b_j, with W
/// the --weights array (one row per support vector), b the --bias values and s the input
/// scaling of --subtract/--divide-by (none by default). Task defaults: regression without
/// labels; binary for 2 labels and one column; ovr when there is one column per label; ovo
/// for k(k−1)/2 columns (pairs in the order (0,1), (0,2), …, (1,2), …; the docs' importing
/// page shows how to lay out pairwise weights).
///
/// Examples:
///   kernelpress import --onnx svm.onnx --out model.safetensors
///   kernelpress import --support-vectors sv.npy --weights w.npy --bias 0.25
///       --kernel 'gaussian(gamma=0.5)' --labels ok,worn --out model.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// An ONNX model holding an SVM (instead of the arrays).
    #[arg(long, conflicts_with_all = ["support_vectors", "weights", "bias", "kernel", "task", "labels", "subtract", "divide_by"])]
    onnx: Option<PathBuf>,
    /// Support vectors, n_sv × d float array (.npy).
    #[arg(long, required_unless_present = "onnx")]
    support_vectors: Option<PathBuf>,
    /// Expansion weights W, one row per support vector: n_sv values (one output) or an
    /// n_sv × outputs array (.npy). For a classifier, the labels times the dual variables.
    #[arg(long, required_unless_present = "onnx")]
    weights: Option<PathBuf>,
    /// The constant added to each output's sum, comma-separated, one per output.
    #[arg(long, allow_hyphen_values = true, required_unless_present = "onnx")]
    bias: Option<String>,
    /// Input scaling applied before the kernel: subtract these per-column values (.npy
    /// of d values, or d comma-separated numbers). Needs --divide-by.
    #[arg(long, allow_hyphen_values = true, requires = "divide_by")]
    subtract: Option<String>,
    /// Input scaling applied before the kernel: then divide by these positive per-column
    /// values (.npy of d values, or d comma-separated numbers). Needs --subtract.
    #[arg(long, requires = "subtract")]
    divide_by: Option<String>,
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
        let ins: Vec<&std::path::Path> = [&a.onnx, &a.support_vectors, &a.weights]
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
        (&a.support_vectors, &a.weights, &a.bias, &a.kernel)
    else {
        return Err(Error::input(
            "give --onnx FILE, or --support-vectors, --weights, --bias and --kernel",
        ));
    };
    let kernel = super::kernel_arg(ks)?;
    let sv_src = svp.display().to_string();
    let sv = read_npy(svp)?.into_2d(&sv_src)?;
    let coef_src = cp.display().to_string();
    let coef = read_npy(cp)?.into_2d(&coef_src)?;
    if coef.nrows() != sv.nrows() {
        let hint = if coef.ncols() == sv.nrows() {
            " — it looks transposed (it has one column per support vector); save its transpose"
        } else {
            ""
        };
        return Err(Error::input(format!(
            "{coef_src}: has {} rows but {sv_src} has {} support vectors; expected one row per support vector{hint}",
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
                .ok_or_else(|| Error::input(format!("--bias: '{s}' is not a finite number")))
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
    let d = sv.ncols();
    let scaling = match (&a.subtract, &a.divide_by) {
        (Some(m), Some(sc)) => Some(kernelpress::data::Standardizer {
            mean: values_arg(m, d, "--subtract")?,
            scale: values_arg(sc, d, "--divide-by")?,
        }),
        _ => None,
    };
    let mut m = ExactModel::new(kernel, sv, coef, intercept, task, labels, scaling)?;
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

/// `d` numbers from a .npy file (any shape holding d values) or a comma-separated list.
fn values_arg(s: &str, d: usize, flag: &str) -> Result<Vec<f64>> {
    let v: Vec<f64> = if s.ends_with(".npy") {
        let p = std::path::Path::new(s);
        read_npy(p)?.into_2d(s)?.iter().copied().collect()
    } else {
        s.split(',')
            .map(|t| {
                t.trim()
                    .parse::<f64>()
                    .map_err(|_| Error::input(format!("{flag}: '{t}' is not a number")))
            })
            .collect::<Result<_>>()?
    };
    if v.len() != d {
        return Err(Error::input(format!(
            "{flag}: {} values; expected {d}, one per input column",
            v.len()
        )));
    }
    Ok(v)
}

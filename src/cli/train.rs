//! `kernelpress train`: fit an exact teacher (kernel ridge or C-SVM) from labelled data.

use clap::ValueEnum;
use kernelpress::data::{check_batch, read_table, Standardizer};
use kernelpress::exact::{fit_ridge, fit_ridge_scaled, fit_svm, RidgeOptions, SmoOptions};
use kernelpress::{Error, Result};
use std::path::PathBuf;
use std::time::Instant;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub(crate) enum ModelKind {
    /// C-SVM by SMO (binary, or one-vs-one for more classes).
    Svm,
    /// Kernel ridge regression (or one-vs-rest least squares with --classify).
    Ridge,
}

/// Fit an exact kernel model from labelled data.
///
/// Example:
///   kernelpress train --data models/pump_train.csv --target condition
///       --kernel 'gaussian(gamma=0.1)' --model svm --c 10 --standardize --out pump_svm.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Training data: CSV with a header row, or .npy (features only).
    #[arg(long)]
    data: PathBuf,
    /// Name of the CSV column holding the target (labels or values).
    #[arg(long, default_value = "target")]
    target: String,
    /// Kernel expression, e.g. 'gaussian(gamma=0.5)'.
    #[arg(long)]
    kernel: String,
    /// Which teacher to fit.
    #[arg(long, value_enum)]
    model: ModelKind,
    /// SVM box constraint C.
    #[arg(long, default_value_t = 1.0, allow_negative_numbers = true)]
    c: f64,
    /// Ridge strength λ for kernel ridge.
    #[arg(long, default_value_t = 1e-3, allow_negative_numbers = true)]
    ridge: f64,
    /// SMO stopping tolerance on the KKT violation.
    #[arg(long, default_value_t = 1e-3, allow_negative_numbers = true)]
    tol: f64,
    /// Kernel cache per binary SMO solver, in MiB.
    #[arg(long, default_value_t = 256)]
    cache_mb: usize,
    /// Kernel ridge: treat the target as class labels (one-vs-rest least squares).
    #[arg(long)]
    classify: bool,
    /// Standardise each feature (mean 0, variance 1 on the training data); stored in the model.
    #[arg(long)]
    standardize: bool,
    /// Output model file (safetensors).
    #[arg(long)]
    out: PathBuf,
}

pub(crate) fn run(a: Args) -> Result<()> {
    let kernel = super::kernel_arg(&a.kernel)?;
    let t = read_table(&a.data, Some(&a.target), true)?;
    let src = a.data.display().to_string();
    check_batch(t.x.view(), t.x.ncols(), &src)?;
    kernel.check_dim(t.x.ncols()).map_err(|e| e.context(&src))?;
    let y = t.target.clone().unwrap();
    let (x, scaling) = if a.standardize {
        let s = Standardizer::fit(t.x.view());
        (s.apply(t.x.view()), Some(s))
    } else {
        (t.x.clone(), None)
    };
    let start = Instant::now();
    let mut model = match a.model {
        ModelKind::Svm => {
            let opts = SmoOptions {
                c: a.c,
                tol: a.tol,
                cache_bytes: a.cache_mb.max(1) << 20,
                max_iter: 0,
            };
            fit_svm(
                &kernel,
                x.view(),
                &y,
                &opts,
                scaling,
                &super::progress::Bars::default(),
            )?
        }
        ModelKind::Ridge => {
            let opts = RidgeOptions {
                ridge: a.ridge,
                classify: a.classify,
            };
            if scaling.is_some() {
                fit_ridge_scaled(
                    &kernel,
                    x.view(),
                    &y,
                    &opts,
                    scaling,
                    &super::progress::Bars::default(),
                )?
            } else {
                fit_ridge(&kernel, x.view(), &y, &opts)?
            }
        }
    };
    let secs = start.elapsed().as_secs_f64();
    if model.n_support_vectors() == 0 {
        return Err(Error::internal("training produced no support vectors"));
    }
    model.feature_names = t.columns.clone();
    if let serde_json::Value::Object(m) = &mut model.training {
        m.insert("target".into(), a.target.clone().into());
        m.insert("data".into(), src.clone().into());
    }
    model.save(&a.out)?;
    let mut msg = format!(
        "trained {} on {} rows × {} features in {:.2} s: {} support vectors, {} outputs",
        match a.model {
            ModelKind::Svm => "C-SVM",
            ModelKind::Ridge => "kernel ridge",
        },
        x.nrows(),
        x.ncols(),
        secs,
        model.n_support_vectors(),
        model.n_outputs()
    );
    if model.task().is_classifier() {
        let s = model.decision(t.x.view());
        let pred = model.labels_of(s.view());
        let acc = pred.iter().zip(&y).filter(|(p, t)| p == t).count() as f64 / y.len() as f64;
        msg.push_str(&format!("; training accuracy {acc:.4}"));
    }
    msg.push_str(&format!("\nwrote {}\n", a.out.display()));
    super::print_stdout(&msg)
}

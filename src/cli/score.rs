//! `kernelpress score`: any model file on data → decision values and labels as CSV.

use kernelpress::model::AnyModel;
use kernelpress::Result;
use std::path::PathBuf;

/// Score a model on data: CSV of decision values (and labels for classifiers).
///
/// Columns name what a positive value favours, with one rule: in `decision_A_vs_B` a
/// positive value favours class A (binary models: A is the second label; one-vs-one: the
/// first class of the pair, and the pairs come in the order (0,1), (0,2), …, (1,2), …);
/// `decision_A` is class A's one-vs-rest score (the largest wins); regression outputs are
/// `decision` or `decision_0 …`. Then `label` for classifiers, and for a guarded model
/// `stage` (`compiled`, `exact`, or `partial` when the exact model recomputed some class
/// pairs: which model answered the row); rows in input order. Data
/// columns are matched to the model's by name (extra columns are ignored with a note);
/// --by-position takes them in file order. --f32 computes in single precision.
///
/// Example:
///   kernelpress score models/pump_svm.safetensors --data models/pump_test.csv --target condition
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Model file (exact, compiled or guarded).
    model: PathBuf,
    /// Data: CSV with a header row, or .npy (features only).
    #[arg(long)]
    data: PathBuf,
    /// A target column to leave out of the features, if the CSV has one.
    #[arg(long)]
    target: Option<String>,
    /// Take the data columns in file order instead of matching the model's column names.
    #[arg(long)]
    by_position: bool,
    /// Write the CSV here instead of stdout.
    #[arg(long)]
    out: Option<PathBuf>,
    /// Compute in single precision (exact and compiled models): faster in batches;
    /// decisions move by f32 rounding, and `report` measures what that does to the labels
    /// (`agreement_f32_batch`, `agreement_exact_f32_batch`).
    #[arg(long)]
    f32: bool,
}

pub(crate) fn run(a: Args) -> Result<()> {
    if let Some(o) = &a.out {
        super::guard_outputs(&[&a.model, &a.data], &[(o, false)])?;
    }
    let (model, _) = AnyModel::load(&a.model)?;
    let t = super::read_for(
        &a.data,
        a.target.as_deref(),
        model.feature_names(),
        a.by_position,
    )?;
    let (s, stages) = if a.f32 {
        let s = model.decision_f32(t.x.view()).ok_or_else(|| {
            kernelpress::Error::input(format!(
                "{}: a guarded model scores in f64 only (its threshold was calibrated on f64 decisions); leave out --f32",
                a.model.display()
            ))
        })?;
        (s, None)
    } else {
        model.decision_with_stage(t.x.view())
    };
    if let Some(i) = s.iter().position(|v| !v.is_finite()) {
        return Err(kernelpress::Error::numerical(format!(
            "{}: row {}: the decision value is not finite (overflow); the model's kernel is too extreme for this row",
            a.data.display(),
            i / s.ncols().max(1) + 1
        )));
    }
    let k = s.ncols();
    let classifier = model.task().is_classifier();
    let mut header = model.rule().decision_names();
    debug_assert_eq!(header.len(), k);
    if classifier {
        header.push("label".into());
    }
    if stages.is_some() {
        header.push("stage".into());
    }
    let labels = model.labels_of(s.view());
    let rows: Vec<Vec<String>> = s
        .rows()
        .into_iter()
        .zip(labels)
        .enumerate()
        .map(|(i, (r, l))| {
            let mut v: Vec<String> = r.iter().map(|x| format!("{x:?}")).collect();
            if classifier {
                v.push(l);
            }
            if let Some(st) = &stages {
                v.push(kernelpress::model::guarded::STAGES[st[i] as usize].to_string());
            }
            v
        })
        .collect();
    match a.out {
        Some(p) => kernelpress::data::write_csv(&p, &header, &rows),
        None => {
            let mut text = header.join(",");
            text.push('\n');
            for r in rows {
                text.push_str(&r.join(","));
                text.push('\n');
            }
            super::print_stdout(&text)
        }
    }
}

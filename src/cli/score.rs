//! `kernelpress score`: any model file on data → decision values and labels as CSV.

use kernelpress::model::AnyModel;
use kernelpress::Result;
use std::path::PathBuf;

/// Score a model on data: one CSV row per input row, in input order.
///
/// Classifiers: `label` (the predicted class), `margin` (how decided the row is, in
/// decision units; 0 is on the boundary), then one column per class in the label order
/// `inspect` lists: `wins_<class>` for one-vs-one models (pairwise contests the class won),
/// `score_<class>` for binary and one-vs-rest models (the larger wins). Regression models:
/// `decision` (or `decision_0 …`). A guarded model adds `stage` (`compiled`, `exact`, or
/// `partial` when the exact model recomputed some class pairs: which model answered).
/// --decisions also writes the raw decision values (see its help for their order and
/// signs). Data columns are matched to the model's by name (extra columns are ignored with
/// a note); --by-position takes them in file order. --f32 computes in single precision.
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
    /// With --f32: the precision of a compiled model's head products (f32, bf16 or int8),
    /// in place of the one it was compiled with (`compile --head-precision`).
    #[arg(long, value_name = "P", requires = "f32")]
    head_precision: Option<String>,
    /// Also write the raw decision values, after the class columns, one per output, named
    /// so that a positive value favours the class named first: `decision_A_vs_B`. Binary
    /// models: one column, A the second label. One-vs-one models: one per class pair in
    /// the order (0,1), (0,2), …, (0,k−1), (1,2), … of the label order; a row's label is
    /// the class with most wins, ties to the earlier label. One-vs-rest: `decision_A` per
    /// class.
    #[arg(long)]
    decisions: bool,
    /// Also write class probabilities, `prob_<class>` per class (each row sums to 1), after
    /// the class columns: Platt sigmoids fitted when the model was compiled from labelled
    /// calibration rows (or imported from an ONNX SVM with `prob_a`/`prob_b`), coupled
    /// pairwise for more than two classes (Wu, Lin & Weng 2004, method 2).
    #[arg(long)]
    probabilities: bool,
}

pub(crate) fn run(a: Args) -> Result<()> {
    if let Some(o) = &a.out {
        super::guard_outputs(&[&a.model, &a.data], &[(o, false)])?;
    }
    let (mut model, _) = AnyModel::load(&a.model)?;
    if let Some(p) = &a.head_precision {
        let p = p.parse().map_err(|e: kernelpress::Error| {
            kernelpress::Error::input(format!("--head-precision: {}", e.message()))
        })?;
        model.set_head_precision(p).map_err(|e| {
            kernelpress::Error::input(format!("{}: {}", a.model.display(), e.message()))
        })?;
    }
    if a.f32 {
        if let Some(p) = model.head_precision() {
            super::warn_slow_head(p);
        }
    }
    super::note_unverified(&a.model);
    let t = super::read_for(
        &a.data,
        a.target.as_deref(),
        model.feature_names(),
        a.by_position,
    )?;
    let (s, stages) = if a.f32 {
        model.decision_f32_with_stage(t.x.view())
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
    let rule = model.rule();
    let classifier = model.task().is_classifier();
    let probs = if a.probabilities {
        let Some((p, _)) = model.probabilities() else {
            return Err(kernelpress::Error::input(format!(
                "{}: the model carries no probability calibration; compile it with labelled calibration rows (--calib with --target) to fit one",
                a.model.display()
            )));
        };
        Some(p.class_probabilities(rule, s.view()))
    } else {
        None
    };
    let mut header: Vec<String> = Vec::new();
    if classifier {
        header.push("label".into());
        header.extend(rule.class_column_names());
    }
    if probs.is_some() {
        header.extend(rule.labels().iter().map(|l| format!("prob_{l}")));
    }
    if a.decisions || !classifier {
        header.extend(rule.decision_names());
    }
    if stages.is_some() {
        header.push("stage".into());
    }
    let labels = model.labels_of(s.view());
    // One-vs-one class columns are counts of contests won: written as whole numbers.
    let counts = rule.task() == kernelpress::model::Task::Ovo;
    let rows: Vec<Vec<String>> = s
        .rows()
        .into_iter()
        .zip(labels)
        .enumerate()
        .map(|(i, (r, l))| {
            let mut v: Vec<String> = Vec::with_capacity(header.len());
            if classifier {
                v.push(l);
                v.extend(rule.class_row(r).iter().enumerate().map(|(j, x)| {
                    if counts && j > 0 {
                        format!("{}", *x as u64)
                    } else {
                        format!("{x:?}")
                    }
                }));
            }
            if let Some(p) = &probs {
                v.extend(p.row(i).iter().map(|x| format!("{x:?}")));
            }
            if a.decisions || !classifier {
                v.extend(r.iter().map(|x| format!("{x:?}")));
            }
            if let Some(st) = &stages {
                v.push(kernelpress::model::guarded::STAGES[st[i] as usize].to_string());
            }
            v
        })
        .collect();
    match a.out {
        Some(p) => kernelpress::data::write_csv(&p, &header, &rows),
        None => super::print_stdout(&kernelpress::data::csv_text(&header, &rows)),
    }
}

//! `kernelpress score`: any model file on data → decision values and labels as CSV.

use kernelpress::data::{check_batch, read_table};
use kernelpress::model::AnyModel;
use kernelpress::Result;
use std::path::PathBuf;

/// Score a model on data: CSV of decision values (and labels for classifiers).
///
/// Columns: `decision` for regression and binary models (positive means the second class
/// label), `decision_0 … decision_{k-1}` for multi-output models, and `label` for
/// classifiers; rows in input order.
///
/// Example:
///   kernelpress score models/pump_svm.safetensors --data models/pump_test.csv --target condition
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Model file (exact or compiled).
    model: PathBuf,
    /// Data: CSV with a header row, or .npy (features only).
    #[arg(long)]
    data: PathBuf,
    /// A target column to leave out of the features, if the CSV has one.
    #[arg(long)]
    target: Option<String>,
    /// Write the CSV here instead of stdout.
    #[arg(long)]
    out: Option<PathBuf>,
}

pub(crate) fn run(a: Args) -> Result<()> {
    let (model, _) = AnyModel::load(&a.model)?;
    let t = read_table(&a.data, a.target.as_deref(), false)?;
    check_batch(t.x.view(), model.input_dim(), &a.data.display().to_string())?;
    let s = model.decision(t.x.view());
    let k = s.ncols();
    let classifier = model.task().is_classifier();
    let mut header: Vec<String> = if k == 1 {
        vec!["decision".into()]
    } else {
        (0..k).map(|j| format!("decision_{j}")).collect()
    };
    if classifier {
        header.push("label".into());
    }
    let labels = model.labels_of(s.view());
    let rows: Vec<Vec<String>> = s
        .rows()
        .into_iter()
        .zip(labels)
        .map(|(r, l)| {
            let mut v: Vec<String> = r.iter().map(|x| format!("{x:?}")).collect();
            if classifier {
                v.push(l);
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

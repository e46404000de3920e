//! `kernelpress inspect`: a model file's manifest and sizes.

use kernelpress::model::{AnyModel, TensorFile};
use kernelpress::Result;
use std::path::PathBuf;

/// Show a model file's manifest and sizes.
///
/// Example:
///   kernelpress inspect models/pump_svm.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Model file.
    model: PathBuf,
    /// Print one JSON object (manifest, tensors, sizes).
    #[arg(long)]
    json: bool,
}

fn tensors_json(f: &TensorFile) -> serde_json::Value {
    let mut m = serde_json::Map::new();
    for (k, t) in &f.tensors {
        m.insert(
            k.clone(),
            serde_json::json!({"shape": t.shape, "dtype": t.data.dtype_name()}),
        );
    }
    serde_json::Value::Object(m)
}

/// The lines every model kind shares: task, labels, input dimension and scaling.
fn shape_lines(
    s: &mut String,
    task: kernelpress::model::Task,
    labels: &[String],
    d: usize,
    scaled: bool,
) {
    s.push_str(&format!("task            {}\n", task.name()));
    if !labels.is_empty() {
        s.push_str(&format!("labels          {}\n", labels.join(", ")));
    }
    s.push_str(&format!("input dim       {d}\n"));
    let scaling = if scaled { "standardize" } else { "none" };
    s.push_str(&format!("input scaling   {scaling}\n"));
}

pub(crate) fn run(a: Args) -> Result<()> {
    let (model, file) = AnyModel::load(&a.model)?;
    super::note_unverified(&a.model);
    let bytes = std::fs::metadata(&a.model).map(|m| m.len()).unwrap_or(0);
    let params: usize = file.tensors.values().map(|t| t.data.len()).sum();
    let param_bytes = file.data_bytes();
    if a.json {
        let v = serde_json::json!({
            "file": a.model.display().to_string(),
            "file_bytes": bytes,
            "parameters": params,
            "manifest": serde_json::Value::Object(file.manifest.clone()),
            "tensors": tensors_json(&file),
        });
        return super::print_stdout(&format!("{}\n", serde_json::to_string_pretty(&v).unwrap()));
    }
    let mut s = String::new();
    s.push_str(&format!(
        "file            {} ({} bytes)\n",
        a.model.display(),
        bytes
    ));
    match &model {
        AnyModel::Exact(m) => {
            s.push_str("kind            exact kernel model\n");
            s.push_str(&format!("kernel          {}\n", m.kernel()));
            shape_lines(
                &mut s,
                m.task(),
                m.labels(),
                m.input_dim(),
                m.scaling().is_some(),
            );
            s.push_str(&format!("support vectors {}\n", m.n_support_vectors()));
            s.push_str(&format!("outputs         {}\n", m.n_outputs()));
            s.push_str(&format!(
                "cost/prediction {} kernel evaluations, ≈{} flops\n",
                m.n_support_vectors(),
                m.flops()
            ));
            if let Some(t) = m.training.get("model") {
                s.push_str(&format!("trained as      {}\n", t.as_str().unwrap_or("?")));
            }
        }
        AnyModel::Compiled(m) => {
            let spec = m.spec();
            s.push_str("kind            compiled (feature map + linear head)\n");
            s.push_str(&format!("kernel          {}\n", spec.kernel));
            s.push_str(&format!(
                "method          {} (seed {})\n",
                spec.method.name(),
                spec.seed
            ));
            s.push_str(&format!(
                "features        {} (requested {})\n",
                m.features(),
                spec.features
            ));
            shape_lines(
                &mut s,
                m.task(),
                m.labels(),
                m.input_dim(),
                m.scaling().is_some(),
            );
            s.push_str(&format!("outputs         {}\n", m.n_outputs()));
            s.push_str(&format!("cost/prediction ≈{} flops\n", m.flops()));
            if let Some(fit) = m.fit.get("head").and_then(|v| v.as_str()) {
                s.push_str(&format!("head fit        {fit}\n"));
            }
            if let Some(a) = m.report.get("agreement").and_then(|v| v.as_f64()) {
                s.push_str(&format!(
                    "agreement       {a:.4} with the exact model (at compile time)\n"
                ));
            }
        }
        AnyModel::Guarded(g) => {
            let m = g.compact();
            let spec = m.spec();
            s.push_str(
                "kind            guarded (compiled model, exact model where it is unsure)\n",
            );
            s.push_str(&format!("kernel          {}\n", spec.kernel));
            s.push_str(&format!(
                "compiled stage  {} with {} features (seed {})\n",
                spec.method.name(),
                m.features(),
                spec.seed
            ));
            s.push_str(&format!(
                "exact stage     {} support vectors\n",
                g.exact().n_support_vectors()
            ));
            use kernelpress::model::guarded::GuardRule;
            s.push_str(&match g.guard_rule() {
                GuardRule::Row => format!(
                    "guard           rows whose smallest margin of the predicted class is below {} go to the exact model\n",
                    g.threshold()
                ),
                GuardRule::Pairs => format!(
                    "guard           class pairs with |decision| below {} that involve a class that could still win are recomputed by the exact model (from those pairs' support vectors only)\n",
                    g.threshold()
                ),
            });
            if let Some(r) = g.guard.get("fallback_share").and_then(|v| v.as_f64()) {
                let work = g
                    .guard
                    .get("work_share")
                    .and_then(|v| v.as_f64())
                    .map(|w| {
                        format!(
                            ", reading {:.1}% of the support vectors per row on average",
                            100.0 * w
                        )
                    })
                    .unwrap_or_default();
                s.push_str(&format!(
                    "                the exact model took part in {:.1}% of the rows it was chosen on{work}\n",
                    100.0 * r
                ));
            }
            shape_lines(
                &mut s,
                m.task(),
                m.labels(),
                m.input_dim(),
                m.scaling().is_some(),
            );
        }
    }
    let program = match &model {
        AnyModel::Compiled(m) => Some(m),
        AnyModel::Guarded(g) => Some(g.compact()),
        AnyModel::Exact(_) => None,
    };
    if let Some(m) = program {
        let n = m.program().len();
        s.push_str(&format!(
            "program         {n} step{} (x = the scaled input row; parameter bytes and flops per row)\n",
            if n == 1 { "" } else { "s" }
        ));
        for line in m.program().describe() {
            s.push_str(&format!("  {line}\n"));
        }
        s.push_str(&format!(
            "  head           {} × {} weights{}\n",
            m.head().nrows(),
            m.head().ncols(),
            if m.is_folded() {
                " (folded into the last projection)"
            } else {
                ""
            }
        ));
    }
    s.push_str(&format!(
        "parameters      {params} values, {param_bytes} bytes (format version {})\n",
        file.version()
    ));
    s.push_str(match file.integrity {
        kernelpress::format::Integrity::Verified => {
            "checksum        verified (xxh3-64 of the manifest and every tensor)\n"
        }
        _ => "checksum        none (written by an earlier version; contents not verifiable)\n",
    });
    s.push_str("tensors\n");
    for (k, t) in &file.tensors {
        s.push_str(&format!(
            "  {k:<22} {:?} {}\n",
            t.shape,
            t.data.dtype_name()
        ));
    }
    super::print_stdout(&s)
}

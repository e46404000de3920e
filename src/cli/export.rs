//! `kernelpress export`: compiled model → ONNX, C, Rust, or plain weights.

use kernelpress::data::write_atomic;
use kernelpress::export::{check_precision, export, ExportOptions, Format, Precision};
use kernelpress::model::CompiledModel;
use kernelpress::{Error, Result};
use std::path::PathBuf;

/// Export a compiled model's weights and program to where it will run.
///
/// Formats (--out is a file for onnx, rust, safetensors; a folder for c and npy):
///   onnx         standard ONNX graph (opset 17): input X float32 [N, d]; outputs
///                decision [N, k], and for classifiers label_index (int64) and label
///                (string). Walsh–Hadamard blocks ≤ 32 become one MatMul by the Hadamard
///                matrix, larger ones radix-8 Reshape+MatMul stages; count sketches use DFT.
///   c            kp_model.h + kp_model.c: C99, libm only, no allocation, re-entrant.
///   rust         one dependency-free module, no unsafe.
///   npy          one .npy per tensor and program.json (the steps, as in the model file).
///   safetensors  the same tensors in one file, the description in its metadata.
/// Every format carries the input scaling and the teacher's label rule. Tensor Sketch
/// programs export to onnx, npy and safetensors only.
///
/// --precision f16 stores the dense projections, landmarks and head as binary16; int8
/// stores the dense projections and the head as int8 with one scale per output; signs and
/// indices stay exact; computation is f32. --check-data measures what the precision costs
/// on your rows (weights at that precision, arithmetic in f64, against the f64 model).
///
/// Examples:
///   kernelpress export pump_compiled.safetensors --format onnx --out pump.onnx
///   kernelpress export pump_compiled.safetensors --format c --prefix pump --out pump_c
///   kernelpress export pump_compiled.safetensors --format rust --precision int8
///       --check-data models/pump_test.csv --target condition --out pump_model.rs
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Compiled model file.
    model: PathBuf,
    /// onnx, c, rust, npy or safetensors.
    #[arg(long)]
    format: String,
    /// f32, f16 or int8.
    #[arg(long, default_value = "f32")]
    precision: String,
    /// Rows (CSV or .npy) on which to measure the precision's cost.
    #[arg(long)]
    check_data: Option<PathBuf>,
    /// A target column of --check-data to leave out of the features.
    #[arg(long)]
    target: Option<String>,
    /// Take the columns of --check-data in file order instead of by name.
    #[arg(long)]
    by_position: bool,
    /// Symbol prefix of the C export.
    #[arg(long, default_value = "kp")]
    prefix: String,
    /// Also write the export summary as JSON here.
    #[arg(long)]
    summary: Option<PathBuf>,
    /// Output file or folder.
    #[arg(long)]
    out: PathBuf,
    /// C and npy exports write a folder, all files or none; an existing folder is refused
    /// unless this flag is given, and then replaced whole.
    #[arg(long)]
    replace_folder: bool,
}

pub(crate) fn run(a: Args) -> Result<()> {
    let mut opts = ExportOptions::new(Format::parse(&a.format)?);
    {
        let mut ins: Vec<&std::path::Path> = vec![&a.model];
        if let Some(c) = &a.check_data {
            ins.push(c);
        }
        let folder = matches!(opts.format, Format::C | Format::Npy);
        let mut outs = vec![(a.out.as_path(), folder)];
        if let Some(s) = &a.summary {
            outs.push((s.as_path(), false));
        }
        super::guard_outputs(&ins, &outs)?;
    }
    opts.precision = Precision::parse(&a.precision)?;
    opts.prefix = a.prefix.clone();
    opts.replace_folder = a.replace_folder;
    if kernelpress::model::TensorFile::read(&a.model)?
        .get_str("kind", &a.model.display().to_string())
        .ok()
        .as_deref()
        == Some("guarded")
    {
        return Err(Error::input(format!(
            "{}: a guarded model (compiled stage plus exact fallback) cannot be exported: no format carries the guard yet (ONNX, C, Rust, npy and safetensors all refuse); export the compiled model it was built from and keep the fallback in your serving code",
            a.model.display()
        )));
    }
    let model = CompiledModel::load(&a.model)?;
    super::note_unverified(&a.model);
    let check = match &a.check_data {
        Some(p) => {
            let t = super::read_for(p, a.target.as_deref(), &model.feature_names, a.by_position)?;
            Some(check_precision(&model, opts.precision, t.x.view())?)
        }
        None => None,
    };
    let mut sum = export(&model, &opts, &a.out)?;
    sum.check = check;
    let mut text = format!(
        "exported {} ({} features, {}) as {} at {}\n",
        a.model.display(),
        model.features(),
        model.spec().method.name(),
        sum.format,
        sum.precision
    );
    for (f, n) in &sum.files {
        text.push_str(&format!("  wrote {f} ({})\n", human_bytes(*n)));
    }
    for l in &sum.steps {
        text.push_str(&format!("  {l}\n"));
    }
    if let Some(c) = &sum.check {
        text.push_str(&format!(
            "precision check on {} rows: max |Δdecision| {:.3e}, RMS {:.3e}",
            c.rows, c.max_abs_decision_change, c.rms_decision_change
        ));
        if let Some(ag) = c.label_agreement {
            text.push_str(&format!(", labels unchanged on {:.4}", ag));
        }
        text.push('\n');
    }
    if let Some(p) = &a.summary {
        write_atomic(
            p,
            format!("{}\n", serde_json::to_string_pretty(&sum).unwrap()).as_bytes(),
        )?;
    }
    super::print_stdout(&text)
}

fn human_bytes(n: u64) -> String {
    kernelpress::report::format_bytes(n as usize)
}

//! `kernelpress export`: compiled model → ONNX, C, Rust, or plain weights.

use kernelpress::data::write_atomic;

use kernelpress::export::{
    check_precision, check_precision_guarded, export, export_guarded, ExportOptions, ExportSummary,
    Format, Precision,
};
use kernelpress::model::{CompiledModel, GuardedModel};
use kernelpress::{Error, ErrorKind, Result};
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
/// Every format carries the input scaling, the teacher's label rule and a description:
/// the input columns in order, labels, decision rule, method and size, the exact model's
/// fingerprint and the agreement measured at compile time (onnx metadata_props; C
/// kp_input_name, kp_model_info and KP_INPUT_NAMES; Rust constants; npy/safetensors
/// export_info). Tensor Sketch programs export to onnx, npy and safetensors only.
///
/// Guarded models (compile --guard-agreement) export whole: the compiled stage at
/// --precision, the exact fallback in f32, the guard's rule and threshold. C and Rust run
/// the exact expansion only for the rows the guard sends to it; ONNX computes both stages
/// for every row and selects per row (output `stage`); npy and safetensors carry the
/// exact.* tensors and the guard section. --stage compact exports the compiled stage alone.
///
/// --precision f16 stores the dense projections, landmarks and head as binary16; int8
/// stores the dense projections and the head as int8 with one scale per output; signs and
/// indices stay exact; computation is f32. --check-data measures what the precision costs
/// on your rows against the f64 model twice: the weights alone (arithmetic in f64) and as
/// shipped (arithmetic in f32); an onnx export is also run by onnxruntime (a Python with
/// onnxruntime, as KP_PYTHON or python3) and a c export built with cc -O2 and run, each
/// timed beside score. It warns when labels change on more than 1% of the rows, and
/// --min-agreement P is a gate on the shipped label agreement (exit 3; with
/// --discard-below-gate nothing is written).
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
    /// Which model to export from a guarded file: guarded (the whole guarded model, the
    /// default) or compact (its compiled stage alone).
    #[arg(long, default_value = "guarded")]
    stage: String,
    /// Gate: exit with code 3 when the shipped labels agree with the f64 model's on less
    /// than this share of the --check-data rows.
    #[arg(long)]
    min_agreement: Option<f64>,
    /// With a failed --min-agreement gate, write nothing.
    #[arg(long)]
    discard_below_gate: bool,
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
    if a.stage != "guarded" && a.stage != "compact" {
        return Err(Error::input(format!(
            "--stage '{}' is unknown; expected guarded or compact",
            a.stage
        )));
    }
    if let Some(p) = a.min_agreement {
        if !(0.0..=1.0).contains(&p) {
            return Err(Error::input(format!(
                "--min-agreement {p} must be between 0 and 1"
            )));
        }
        if a.check_data.is_none() {
            return Err(Error::input(
                "--min-agreement judges the export on rows: give --check-data FILE",
            ));
        }
    }
    let src = a.model.display().to_string();
    let file = kernelpress::model::TensorFile::read(&a.model)?;
    let is_guarded = file.get_str("kind", &src).ok().as_deref() == Some("guarded");
    let guard = if is_guarded && a.stage == "guarded" {
        Some(GuardedModel::from_file(&file, &src)?)
    } else {
        None
    };
    let model = match (&guard, is_guarded) {
        (Some(g), _) => g.compact().clone(),
        (None, true) => {
            // The compiled stage alone: the stored report judged the guarded model, so it
            // does not describe this one.
            let g = GuardedModel::from_file(&file, &src)?;
            let mut m = g.compact().clone();
            m.report = serde_json::json!({"note": "compiled stage extracted from a guarded model; its own agreement was not stored"});
            m.exact_fingerprint = Some(g.exact().fingerprint());
            m
        }
        (None, false) => CompiledModel::from_file(&file, &src)?,
    };
    super::note_unverified(&a.model);
    let rows = match &a.check_data {
        Some(p) => Some(super::read_for(
            p,
            a.target.as_deref(),
            &model.feature_names,
            a.by_position,
        )?),
        None => None,
    };
    let check = match &rows {
        Some(t) => Some(match &guard {
            Some(g) => check_precision_guarded(g, opts.precision, t.x.view())?,
            None => check_precision(&model, opts.precision, t.x.view())?,
        }),
        None => None,
    };
    let write = |out: &std::path::Path| match &guard {
        Some(g) => export_guarded(g, &opts, out),
        None => export(&model, &opts, out),
    };
    // ONNX with check rows: the file is built in a private temporary folder first and run
    // by onnxruntime there; it is written to --out (as every output is) only when kept.
    let mut staged: Option<(tempfile::TempDir, std::path::PathBuf, ExportSummary)> = None;
    let mut runtime = None;
    if let (Some(t), Format::Onnx) = (&rows, opts.format) {
        let dir = tempfile::Builder::new()
            .prefix("kernelpress-export")
            .tempdir()
            .map_err(|e| Error::io(format!("a temporary folder for the onnxruntime check: {e}")))?;
        let tmp = dir.path().join("model.onnx");
        let sum = write(&tmp)?;
        let reference = match &guard {
            Some(g) => g.decision(t.x.view()).0,
            None => model.decision(t.x.view()),
        };
        runtime =
            super::export_check::onnxruntime(&tmp, t.x.view(), reference.view(), model.rule())?;
        staged = Some((dir, tmp, sum));
    }
    // C with check rows: built in a private temporary folder with the system's cc -O2 and
    // run on the rows; the folder at --out is written afterwards (the same files).
    if let (Some(t), Format::C) = (&rows, opts.format) {
        let dir = tempfile::Builder::new()
            .prefix("kernelpress-export")
            .tempdir()
            .map_err(|e| Error::io(format!("a temporary folder for the C check: {e}")))?;
        let folder = dir.path().join("c");
        write(&folder)?;
        let reference = match &guard {
            Some(g) => g.decision(t.x.view()).0,
            None => model.decision(t.x.view()),
        };
        runtime = super::export_check::c_export(
            &folder,
            &opts.prefix,
            t.x.view(),
            reference.view(),
            model.rule(),
        )?;
    }
    let mut text = String::new();
    let mut gate = None;
    if let Some(c) = &check {
        text.push_str(&format!(
            "precision check on {} rows: weights at {} (f64 arithmetic) max |Δdecision| {:.3e}, RMS {:.3e}",
            c.rows,
            opts.precision.name(),
            c.max_abs_decision_change,
            c.rms_decision_change
        ));
        if let Some(ag) = c.label_agreement {
            text.push_str(&format!(", labels unchanged on {ag:.4}"));
        }
        text.push_str(&format!(
            "\n  as shipped (f32 arithmetic): max |Δdecision| {:.3e}",
            c.shipped_max_abs_decision_change
        ));
        if let Some(ag) = c.shipped_label_agreement {
            text.push_str(&format!(", labels unchanged on {ag:.4}"));
        }
        let mut judged = c.shipped_label_agreement;
        match (&runtime, opts.format) {
            (Some(r), _) => {
                text.push_str(&format!(
                    "\n  in {}: max |Δdecision| {:.3e}",
                    r.runtime, r.max_abs_decision_change
                ));
                if let Some(ag) = r.label_agreement {
                    text.push_str(&format!(", labels unchanged on {ag:.4}"));
                    judged = Some(ag);
                }
            }
            (None, Format::Onnx) => text.push_str(
                "\n  onnxruntime not found (a Python with onnxruntime and numpy, as KP_PYTHON or python3): the file was not run",
            ),
            (None, Format::C) => {
                text.push_str("\n  no C compiler found (cc or gcc): the export was not built")
            }
            _ => {}
        }
        if let Some(ag) = judged {
            if ag < 0.99 {
                text.push_str(&format!(
                    "\nwarning: labels change on {:.1}% of the check rows at {}: validate this export before use, or export at a higher precision",
                    100.0 * (1.0 - ag),
                    opts.precision.name()
                ));
            }
            if let Some(p) = a.min_agreement {
                if ag < p {
                    gate = Some(format!(
                        "shipped label agreement {ag:.4} < --min-agreement {p}"
                    ));
                }
            }
        } else if a.min_agreement.is_some() {
            return Err(Error::input(
                "--min-agreement applies to classifiers; this model is a regression",
            ));
        }
        text.push('\n');
    }
    if let (Some(r), Some(t)) = (&runtime, &rows) {
        // Time what ships beside score's own f32 paths, one thread each for single rows.
        use kernelpress::report::{measure_batch, measure_single};
        let x = t.x.view();
        let (single, batch) = match &guard {
            Some(g) => (
                measure_single(x, 2000, |row| g.decision_one(row).0).p50_us,
                measure_batch(x, |b| g.decision_f32(b).0),
            ),
            None => (
                measure_single(x, 2000, |row| model.decision_one_f32(row)).p50_us,
                measure_batch(x, |b| model.decision_f32(b)),
            ),
        };
        text.push_str(&format!(
            "  speed: {} single row {:.1} µs, {:.0} rows/s (1 thread); score {} single row {:.1} µs, batch {:.0} rows/s ({} threads)\n",
            r.runtime,
            r.single_us_p50,
            r.batch_rows_per_s,
            if guard.is_some() { "(guarded: single row in f64, batch in f32)" } else { "(f32)" },
            single,
            batch,
            rayon::current_num_threads()
        ));
    }
    if let (Some(why), true) = (&gate, a.discard_below_gate) {
        text.push_str(&format!(
            "not written: {} (--discard-below-gate)\n",
            a.out.display()
        ));
        super::print_stdout(&text)?;
        return Err(Error::new(ErrorKind::Gate, why.clone()));
    }
    let mut sum = match staged {
        Some((dir, tmp, mut sum)) => {
            let bytes =
                std::fs::read(&tmp).map_err(|e| Error::io(format!("{}: {e}", tmp.display())))?;
            write_atomic(&a.out, &bytes)?;
            drop(dir);
            for f in sum.files.iter_mut() {
                f.0 = a.out.display().to_string();
            }
            sum
        }
        None => write(&a.out)?,
    };
    sum.check = check;
    sum.runtime_check = runtime.map(|r| serde_json::to_value(r).unwrap_or_default());
    let what = match (&guard, is_guarded) {
        (Some(_), _) => "guarded model",
        (None, true) => "compiled stage",
        (None, false) => "model",
    };
    let mut head = format!(
        "exported {} ({what}: {} features, {}) as {} at {}\n",
        a.model.display(),
        model.features(),
        model.spec().method.name(),
        sum.format,
        sum.precision
    );
    for (f, n) in &sum.files {
        head.push_str(&format!("  wrote {f} ({})\n", human_bytes(*n)));
    }
    for l in &sum.steps {
        head.push_str(&format!("  {l}\n"));
    }
    head.push_str(&text);
    if let Some(p) = &a.summary {
        write_atomic(
            p,
            format!("{}\n", serde_json::to_string_pretty(&sum).unwrap()).as_bytes(),
        )?;
    }
    super::finish_gate(&head, gate, &a.out)
}

fn human_bytes(n: u64) -> String {
    kernelpress::report::format_bytes(n as usize)
}

//! Exports of compiled models: ONNX, C, Rust, and plain weights (`.npy` folder or one
//! safetensors file) with a JSON description of the steps; at f32, f16 or int8.
//!
//! Each backend is one module, and in it each program step has one lowering:
//! [`onnx`] (standard operators, opset 17), [`c`] (self-contained C99), [`rust`] (one
//! dependency-free module), [`arrays`] (weights + JSON). [`precision`] decides how each
//! tensor is stored (the dense projection and the head as int8 with per-row scales under
//! `int8`; signs and indices always exact) and measures what a precision costs on data.
//!
//! ```
//! use kernelpress::export::{Format, Precision};
//! assert_eq!(Format::parse("onnx").unwrap(), Format::Onnx);
//! assert_eq!(Precision::parse("int8").unwrap().name(), "int8");
//! ```

pub mod arrays;
pub mod c;
mod code;
pub mod meta;
pub mod onnx;
pub mod precision;
pub mod rust;

pub use precision::{check_precision, check_precision_guarded, PrecisionCheck, Quant};

use crate::model::{CompiledModel, GuardedModel};
use crate::{Error, Result};
use serde::Serialize;
use std::path::Path;

/// An export target.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// A standard ONNX graph (one `.onnx` file).
    Onnx,
    /// `kp_model.h` and `kp_model.c` in a folder.
    C,
    /// One `.rs` module.
    Rust,
    /// A folder of `.npy` weights and `program.json`.
    Npy,
    /// One safetensors file of weights with the description in its metadata.
    Safetensors,
}

impl Format {
    /// Parses `onnx`, `c`, `rust`, `npy` or `safetensors`.
    pub fn parse(s: &str) -> Result<Format> {
        Ok(match s {
            "onnx" => Format::Onnx,
            "c" => Format::C,
            "rust" => Format::Rust,
            "npy" => Format::Npy,
            "safetensors" => Format::Safetensors,
            o => {
                return Err(Error::input(format!(
                    "export format '{o}' is unknown{}; expected onnx, c, rust, npy or safetensors",
                    crate::error::did_you_mean(o, &["onnx", "c", "rust", "npy", "safetensors"])
                )))
            }
        })
    }
    /// The name.
    pub fn name(self) -> &'static str {
        match self {
            Format::Onnx => "onnx",
            Format::C => "c",
            Format::Rust => "rust",
            Format::Npy => "npy",
            Format::Safetensors => "safetensors",
        }
    }
}

/// How real-valued weights are stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Precision {
    /// 32-bit floats.
    F32,
    /// 16-bit floats (IEEE binary16), computed in f32.
    F16,
    /// 8-bit integers with one f32 scale per row for the dense projections and the head
    /// (others f32), computed in f32.
    Int8,
}

impl Precision {
    /// Parses `f32`, `f16` or `int8`.
    pub fn parse(s: &str) -> Result<Precision> {
        Ok(match s {
            "f32" => Precision::F32,
            "f16" => Precision::F16,
            "int8" => Precision::Int8,
            o => {
                return Err(Error::input(format!(
                    "precision '{o}' is unknown{}; expected f32, f16 or int8",
                    crate::error::did_you_mean(o, &["f32", "f16", "int8"])
                )))
            }
        })
    }
    /// The name.
    pub fn name(self) -> &'static str {
        match self {
            Precision::F32 => "f32",
            Precision::F16 => "f16",
            Precision::Int8 => "int8",
        }
    }
}

/// Options of an export.
#[derive(Debug, Clone)]
pub struct ExportOptions {
    /// Target.
    pub format: Format,
    /// Weight precision.
    pub precision: Precision,
    /// Symbol prefix of the C export (`kp` by default).
    pub prefix: String,
    /// Replace an existing output folder whole (C and npy exports write a folder, all or
    /// none); without it an existing folder is refused.
    pub replace_folder: bool,
}

impl ExportOptions {
    /// Defaults for a format: f32, prefix `kp`.
    pub fn new(format: Format) -> ExportOptions {
        ExportOptions {
            format,
            precision: Precision::F32,
            prefix: "kp".into(),
            replace_folder: false,
        }
    }
}

/// What an export wrote and how each step was lowered.
#[derive(Debug, Clone, Serialize)]
pub struct ExportSummary {
    /// Format name.
    pub format: String,
    /// Precision name.
    pub precision: String,
    /// Files written with their sizes in bytes.
    pub files: Vec<(String, u64)>,
    /// One line per program step: how it was lowered.
    pub steps: Vec<String>,
    /// The precision's measured cost, when data was given.
    pub check: Option<PrecisionCheck>,
    /// The same check run in the target's own runtime (onnxruntime for ONNX), when the
    /// caller ran one.
    pub runtime_check: Option<serde_json::Value>,
}

/// Writes `model` to `out` (a file, or a folder for C and `.npy`). Every output is written
/// atomically; nothing is written when the model cannot be exported to the format.
pub fn export(model: &CompiledModel, opts: &ExportOptions, out: &Path) -> Result<ExportSummary> {
    export_with(model, None, opts, out)
}

/// Writes the guarded model `g` to `out`: its compiled stage at the export precision, its
/// exact fallback in f32, and the guard's rule and threshold. ONNX evaluates both stages
/// for every row and selects per row (a graph cannot branch per row); C and Rust run the
/// exact expansion only for the rows the guard sends to it; plain weights carry the
/// `exact.*` tensors and the `guard` section for the caller's own code.
pub fn export_guarded(g: &GuardedModel, opts: &ExportOptions, out: &Path) -> Result<ExportSummary> {
    export_with(g.compact(), Some(g), opts, out)
}

fn export_with(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    opts: &ExportOptions,
    out: &Path,
) -> Result<ExportSummary> {
    let q = precision::quantize(model, opts.precision);
    let (files, steps) = match opts.format {
        Format::Onnx => onnx::write(model, guard, &q, out)?,
        Format::C => c::write(model, guard, &q, &opts.prefix, out, opts.replace_folder)?,
        Format::Rust => rust::write(model, guard, &q, out)?,
        Format::Npy => arrays::write_npy(model, guard, &q, out, opts.replace_folder)?,
        Format::Safetensors => arrays::write_safetensors(model, guard, &q, out)?,
    };
    let mut steps = steps;
    steps.extend(q.notes.iter().cloned());
    let files = files
        .into_iter()
        .map(|p| {
            let n = std::fs::metadata(&p).map(|m| m.len()).unwrap_or(0);
            (p.display().to_string(), n)
        })
        .collect();
    Ok(ExportSummary {
        format: opts.format.name().into(),
        precision: opts.precision.name().into(),
        files,
        steps,
        check: None,
        runtime_check: None,
    })
}

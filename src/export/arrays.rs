//! Plain weights: a folder of `.npy` files with `program.json`, or one safetensors file
//! whose `__metadata__["kernelpress"]` holds the same description. The description is the
//! model file's manifest (README, "Model files") plus a `tensors` map: for each tensor its
//! file (npy), dtype and shape, and for int8 weights the name of its f32 scales and the axis
//! they run along (`w = q · scale`, one scale per row for axis 0, per column for axis 1).
//! The description also carries `export_info` (the columns in order, labels, decision rule,
//! method, exact model fingerprint, agreement at compile time). A guarded model adds its
//! exact fallback as `exact.support_vectors` `[n, d]`, `exact.coefficients` `[n, k]` and
//! `exact.intercepts` `[k]` in float32 whatever the precision, and the `guard` section of the
//! model file (`rule`, `threshold`; README, "Guarded models").

use super::meta::ArtefactInfo;
use super::precision::{Quant, Quantized};
use crate::format::{Data, TensorFile};
use crate::model::{CompiledModel, GuardedModel};
use crate::Result;
use serde_json::{json, Map, Value};
use std::path::{Path, PathBuf};

fn npy(dtype: &str, shape: &[usize], data: &[u8]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let shape_s = match dims.len() {
        0 => "()".to_string(),
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    let mut header =
        format!("{{'descr': '{dtype}', 'fortran_order': False, 'shape': {shape_s}, }}");
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend((header.len() as u16).to_le_bytes());
    out.extend(header.as_bytes());
    out.extend(data);
    out
}

/// A named tensor to write.
type Named = (String, Vec<usize>, Data);

/// The tensors of `q` as (name, shape, data) plus their entries in the description.
fn entries(q: &Quantized, guard: Option<&GuardedModel>) -> (Vec<Named>, Map<String, Value>) {
    let mut out = Vec::new();
    let mut desc = Map::new();
    let mut exact = Vec::new();
    if let Some(g) = guard {
        for (name, t) in g.exact().to_file().tensors {
            if let (true, Data::F64(v)) = (name.starts_with("exact."), &t.data) {
                exact.push((
                    name,
                    (
                        t.shape.clone(),
                        Quant::F32(v.iter().map(|x| *x as f32).collect()),
                    ),
                ));
            }
        }
    }
    for (name, (shape, v)) in q.tensors.iter().chain(exact.iter().map(|(n, t)| (n, t))) {
        let (data, dtype) = match v {
            Quant::F32(x) => (Data::F32(x.clone()), "float32"),
            Quant::F16(x) => (Data::F16(x.clone()), "float16"),
            Quant::Signs(x) => (Data::I8(x.clone()), "int8"),
            Quant::Index(x) => (Data::I32(x.clone()), "int32"),
            Quant::I8 { q, scale, axis } => {
                let sname = format!("{name}.scale");
                out.push((sname.clone(), vec![scale.len()], Data::F32(scale.clone())));
                desc.insert(
                    name.clone(),
                    json!({"dtype": "int8", "shape": shape, "scale": sname, "scale_axis": axis}),
                );
                out.push((name.clone(), shape.clone(), Data::I8(q.clone())));
                continue;
            }
        };
        desc.insert(name.clone(), json!({"dtype": dtype, "shape": shape}));
        out.push((name.clone(), shape.clone(), data));
    }
    (out, desc)
}

fn description(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    tensors: Map<String, Value>,
) -> Value {
    let f = match guard {
        Some(g) => g.to_file(),
        None => model.to_file(),
    };
    let mut m = f.manifest.clone();
    let kind = if guard.is_some() {
        "guarded-weights"
    } else {
        "compiled-weights"
    };
    m.insert("kind".into(), json!(kind));
    let info: Map<String, Value> = ArtefactInfo::of(model, guard)
        .pairs()
        .into_iter()
        .map(|(k, v)| (k, json!(v)))
        .collect();
    m.insert("export_info".into(), Value::Object(info));
    m.insert("precision".into(), json!(q.precision.name()));
    m.insert("tensors".into(), Value::Object(tensors));
    Value::Object(m)
}

fn bytes_of(d: &Data) -> (&'static str, Vec<u8>) {
    match d {
        Data::F64(v) => ("<f8", v.iter().flat_map(|x| x.to_le_bytes()).collect()),
        Data::F32(v) => ("<f4", v.iter().flat_map(|x| x.to_le_bytes()).collect()),
        Data::F16(v) => ("<f2", v.iter().flat_map(|x| x.to_le_bytes()).collect()),
        Data::I32(v) => ("<i4", v.iter().flat_map(|x| x.to_le_bytes()).collect()),
        Data::I8(v) => ("|i1", v.iter().flat_map(|x| x.to_le_bytes()).collect()),
    }
}

/// A folder of `.npy` files (one per tensor, named after it) and `program.json`.
pub fn write_npy(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    dir: &Path,
    replace: bool,
) -> Result<(Vec<PathBuf>, Vec<String>)> {
    let (ts, mut desc) = entries(q, guard);
    let mut files: Vec<(String, Vec<u8>)> = Vec::new();
    for (name, shape, data) in &ts {
        let (dt, raw) = bytes_of(data);
        let file = format!("{name}.npy");
        files.push((file.clone(), npy(dt, shape, &raw)));
        if let Some(Value::Object(e)) = desc.get_mut(name) {
            e.insert("file".into(), json!(file));
        } else {
            desc.insert(name.clone(), json!({"file": file}));
        }
    }
    let d = description(model, guard, q, desc);
    files.push((
        "program.json".into(),
        format!("{}\n", serde_json::to_string_pretty(&d).expect("json")).into_bytes(),
    ));
    let paths = crate::fsio::write_folder_atomic(dir, &files, replace)?;
    Ok((
        paths,
        vec!["weights as .npy files, steps in program.json".into()],
    ))
}

/// One safetensors file with the description in its metadata.
pub fn write_safetensors(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    out: &Path,
) -> Result<(Vec<PathBuf>, Vec<String>)> {
    let (ts, desc) = entries(q, guard);
    let mut f = TensorFile::default();
    for (name, shape, data) in ts {
        f.put_data(&name, shape, data);
    }
    if let Value::Object(m) = description(model, guard, q, desc) {
        f.manifest = m;
    }
    f.write(out)?;
    Ok((
        vec![out.to_path_buf()],
        vec!["weights as safetensors tensors, steps in the metadata".into()],
    ))
}

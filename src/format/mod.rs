//! The on-disk container, and nothing else: one safetensors file of named tensors (float64,
//! int32 or int8) plus a JSON manifest stored as a string under the `__metadata__` key
//! [`MANIFEST_KEY`]. This module knows no model: the model types decide what the tensors
//! and the manifest mean (see `crate::model`). It is a leaf of the crate's module graph.
//!
//! ```
//! use kernelpress::format::TensorFile;
//! let mut f = TensorFile::default();
//! f.put_f64("head.weights", vec![2, 1], vec![0.5, -1.0]);
//! f.put_i8("step0.signs", vec![2], vec![1, -1]);
//! f.manifest.insert("format_version".into(), 2.into());
//! let back = TensorFile::from_bytes(&f.to_bytes().unwrap(), "mem").unwrap();
//! assert_eq!(back.f64("head.weights", &[Some(2), Some(1)], "mem").unwrap(), vec![0.5, -1.0]);
//! assert_eq!(back.i8("step0.signs", &[Some(2)], "mem").unwrap(), vec![1, -1]);
//! ```

use crate::fsio::{read_bytes, write_atomic};
use crate::{Error, Result};
use safetensors::tensor::{Dtype, SafeTensors, TensorView};
use std::collections::{BTreeMap, HashMap};
use std::path::Path;

/// The `__metadata__` key that holds the JSON manifest.
pub const MANIFEST_KEY: &str = "kernelpress";

/// The manifest field that holds the file's checksum, `xxh3-64:<16 hex digits>`: the
/// XXH3 64-bit hash ([`checksum`]) of the manifest text exactly as stored, with these 16
/// digits read as zeros, and of every tensor's name, dtype, shape and data. A non-cryptographic hash: it catches corruption (a flipped bit,
/// a truncated copy, an edited label), not a deliberate forgery. Chosen over SHA-256 for
/// speed (see docs/format.md for the measurement): a check that reads the whole file on
/// every load must cost little next to reading it.
pub const CHECKSUM_KEY: &str = "checksum";

/// The manifest field (`true`) saying the file must carry a checksum: a second witness, so
/// that one flipped bit in the checksum's own name cannot pass the file off as one written
/// before checksums (the field itself is covered by the checksum).
pub const CHECKSUM_REQUIRED_KEY: &str = "checksum_required";

/// The checksum as it is hashed: its 16 hex digits zeroed.
const PLACEHOLDER: &str = "xxh3-64:0000000000000000";

/// The manifest format version this build writes.
pub const FORMAT_VERSION: u64 = 2;

/// The format versions this build reads.
pub const READ_VERSIONS: [u64; 2] = [1, 2];

/// Largest model file read (bytes); larger files are refused before reading.
pub const MAX_FILE_BYTES: u64 = 8 << 30;

/// A tensor's values.
#[derive(Debug, Clone, PartialEq)]
pub enum Data {
    /// float64 (every real-valued parameter).
    F64(Vec<f64>),
    /// int32 (indices: permutations, gathers, hash buckets).
    I32(Vec<i32>),
    /// int8 (signs, quantized weights).
    I8(Vec<i8>),
    /// float32 (exported weights only; model files use float64).
    F32(Vec<f32>),
    /// IEEE binary16 bit patterns (exported weights only).
    F16(Vec<u16>),
}

impl Data {
    /// Number of elements.
    pub fn len(&self) -> usize {
        match self {
            Data::F64(v) => v.len(),
            Data::I32(v) => v.len(),
            Data::I8(v) => v.len(),
            Data::F32(v) => v.len(),
            Data::F16(v) => v.len(),
        }
    }
    /// True when empty.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Bytes per element.
    pub fn elem_bytes(&self) -> usize {
        match self {
            Data::F64(_) => 8,
            Data::I32(_) => 4,
            Data::I8(_) => 1,
            Data::F32(_) => 4,
            Data::F16(_) => 2,
        }
    }
    /// The dtype's name as safetensors writes it.
    pub fn dtype_name(&self) -> &'static str {
        match self {
            Data::F64(_) => "F64",
            Data::I32(_) => "I32",
            Data::I8(_) => "I8",
            Data::F32(_) => "F32",
            Data::F16(_) => "F16",
        }
    }
}

/// A named tensor: shape and row-major values.
#[derive(Debug, Clone, PartialEq)]
pub struct Tensor {
    /// Shape.
    pub shape: Vec<usize>,
    /// Values.
    pub data: Data,
}

/// Named tensors plus a JSON manifest.
#[derive(Debug, Clone, Default)]
pub struct TensorFile {
    /// Tensors by name.
    pub tensors: BTreeMap<String, Tensor>,
    /// The manifest.
    pub manifest: serde_json::Map<String, serde_json::Value>,
    /// What the checksum check found when the file was read.
    pub integrity: Integrity,
}

/// The result of a file's checksum check.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum Integrity {
    /// Built in memory, not read from a file.
    #[default]
    NotRead,
    /// The stored checksum matched the contents.
    Verified,
    /// The file carries no checksum (written before checksums were added).
    Absent,
}

/// The dtype names the checksum covers.
fn dtype_name(d: Dtype) -> &'static str {
    match d {
        Dtype::F64 => "F64",
        Dtype::F32 => "F32",
        Dtype::F16 => "F16",
        Dtype::I32 => "I32",
        Dtype::I8 => "I8",
        _ => "other",
    }
}

/// The checksum of a manifest text and tensors `(name, dtype, shape, bytes)` taken in name
/// order: XXH3-64 over the manifest's bytes, then per tensor its name, dtype, rank, each
/// size (u64, little-endian) and data, every variable-length part preceded by its length
/// so that no two different contents hash the same stream. Written `xxh3-64:<hex>`.
pub fn checksum<'a>(
    manifest: &str,
    tensors: impl Iterator<Item = (&'a str, &'static str, &'a [usize], &'a [u8])>,
) -> String {
    let mut t: Vec<_> = tensors.collect();
    t.sort_by(|a, b| a.0.cmp(b.0));
    let mut h = xxhash_rust::xxh3::Xxh3::new();
    let mut part = |b: &[u8]| {
        h.update(&(b.len() as u64).to_le_bytes());
        h.update(b);
    };
    part(manifest.as_bytes());
    for (name, dt, shape, data) in t {
        part(name.as_bytes());
        part(dt.as_bytes());
        let dims: Vec<u8> = shape
            .iter()
            .flat_map(|s| (*s as u64).to_le_bytes())
            .collect();
        part(&dims);
        part(data);
    }
    format!("xxh3-64:{:016x}", h.digest())
}

/// Reads only a file's header and says whether it carries a checksum (`None` when it is
/// not a readable safetensors header).
pub fn has_checksum(path: &Path) -> Option<bool> {
    use std::io::Read;
    let mut f = std::fs::File::open(path).ok()?;
    let mut n = [0u8; 8];
    f.read_exact(&mut n).ok()?;
    let n = u64::from_le_bytes(n);
    if n > 100 << 20 {
        return None;
    }
    let mut head = vec![0u8; n as usize];
    f.read_exact(&mut head).ok()?;
    let v: serde_json::Value = serde_json::from_slice(&head).ok()?;
    let text = v.get("__metadata__")?.get(MANIFEST_KEY)?.as_str()?;
    let m: serde_json::Value = serde_json::from_str(text).ok()?;
    Some(m.get(CHECKSUM_KEY).is_some())
}

impl TensorFile {
    fn put(&mut self, name: &str, shape: Vec<usize>, data: Data) {
        debug_assert_eq!(shape.iter().product::<usize>(), data.len());
        self.tensors
            .insert(name.to_string(), Tensor { shape, data });
    }
    /// Adds a float64 tensor.
    pub fn put_f64(&mut self, name: &str, shape: Vec<usize>, data: Vec<f64>) {
        self.put(name, shape, Data::F64(data))
    }
    /// Adds an int32 tensor.
    pub fn put_i32(&mut self, name: &str, shape: Vec<usize>, data: Vec<i32>) {
        self.put(name, shape, Data::I32(data))
    }
    /// Adds an int8 tensor.
    pub fn put_i8(&mut self, name: &str, shape: Vec<usize>, data: Vec<i8>) {
        self.put(name, shape, Data::I8(data))
    }
    /// Adds a tensor of any dtype.
    pub fn put_data(&mut self, name: &str, shape: Vec<usize>, data: Data) {
        self.put(name, shape, data)
    }

    /// Bytes of all tensor data.
    pub fn data_bytes(&self) -> usize {
        self.tensors
            .values()
            .map(|t| t.data.len() * t.data.elem_bytes())
            .sum()
    }

    /// Serialises to safetensors bytes.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        let raw: Vec<(String, Vec<usize>, Dtype, Vec<u8>)> = self
            .tensors
            .iter()
            .map(|(k, t)| {
                let (dt, b) = match &t.data {
                    Data::F64(v) => (Dtype::F64, v.iter().flat_map(|x| x.to_le_bytes()).collect()),
                    Data::I32(v) => (Dtype::I32, v.iter().flat_map(|x| x.to_le_bytes()).collect()),
                    Data::I8(v) => (Dtype::I8, v.iter().flat_map(|x| x.to_le_bytes()).collect()),
                    Data::F32(v) => (Dtype::F32, v.iter().flat_map(|x| x.to_le_bytes()).collect()),
                    Data::F16(v) => (Dtype::F16, v.iter().flat_map(|x| x.to_le_bytes()).collect()),
                };
                (k.clone(), t.shape.clone(), dt, b)
            })
            .collect();
        let mut views = Vec::with_capacity(raw.len());
        for (k, s, dt, b) in &raw {
            let v = TensorView::new(*dt, s.clone(), b)
                .map_err(|e| Error::internal(format!("tensor '{k}': {e}")))?;
            views.push((k.clone(), v));
        }
        let mut meta = HashMap::new();
        let mut manifest = self.manifest.clone();
        manifest.insert(CHECKSUM_REQUIRED_KEY.into(), serde_json::Value::Bool(true));
        manifest.insert(
            CHECKSUM_KEY.into(),
            serde_json::Value::String(PLACEHOLDER.into()),
        );
        // Hash the manifest text exactly as stored, with the checksum's digits zeroed, then
        // write the digits in place (same length, so nothing else moves).
        let placeholder_text = serde_json::Value::Object(manifest).to_string();
        let sum = checksum(
            &placeholder_text,
            raw.iter()
                .map(|(k, s, dt, b)| (k.as_str(), dtype_name(*dt), s.as_slice(), b.as_slice())),
        );
        let text = placeholder_text.replacen(PLACEHOLDER, &sum, 1);
        meta.insert(MANIFEST_KEY.to_string(), text);
        safetensors::serialize(views, Some(meta))
            .map_err(|e| Error::internal(format!("cannot serialise model: {e}")))
    }

    /// Writes atomically to `path`.
    pub fn write(&self, path: &Path) -> Result<()> {
        write_atomic(path, &self.to_bytes()?)
    }

    /// Reads and validates a file.
    pub fn read(path: &Path) -> Result<TensorFile> {
        let src = path.display().to_string();
        if let Ok(m) = std::fs::metadata(path) {
            if m.is_file() && m.len() > MAX_FILE_BYTES {
                return Err(Error::file(format!(
                    "{src}: file is {} bytes, larger than the {} bytes a model file may have",
                    m.len(),
                    MAX_FILE_BYTES
                )));
            }
        }
        let bytes = read_bytes(path)?;
        Self::from_bytes(&bytes, &src)
    }

    /// The manifest's `format_version`.
    pub fn version(&self) -> u64 {
        self.manifest
            .get("format_version")
            .and_then(|v| v.as_u64())
            .unwrap_or(0)
    }

    /// Parses safetensors bytes; `src` names them in errors.
    pub fn from_bytes(bytes: &[u8], src: &str) -> Result<TensorFile> {
        if bytes.is_empty() {
            return Err(Error::file(format!(
                "{src}: file is empty; expected a kernelpress model (safetensors)"
            )));
        }
        if bytes.len() < 8 {
            return Err(Error::file(format!(
                "{src}: truncated: {} bytes, a safetensors file starts with an 8-byte header size",
                bytes.len()
            )));
        }
        let n = u64::from_le_bytes(bytes[..8].try_into().expect("8 bytes"));
        if n > (bytes.len() as u64 - 8) {
            return Err(Error::file(format!(
                "{src}: header claims {n} bytes but the file has only {} after the size field (truncated or not a safetensors file)",
                bytes.len() - 8
            )));
        }
        let st = SafeTensors::deserialize(bytes).map_err(|e| {
            Error::file(format!(
                "{src}: not a valid safetensors file ({e}); the file may be truncated or corrupted"
            ))
        })?;
        let (_, meta) = SafeTensors::read_metadata(bytes)
            .map_err(|e| Error::file(format!("{src}: bad safetensors header ({e})")))?;
        let text = meta
            .metadata()
            .as_ref()
            .and_then(|m| m.get(MANIFEST_KEY))
            .ok_or_else(|| {
                Error::file(format!(
                    "{src}: safetensors file has no '{MANIFEST_KEY}' manifest in __metadata__; not a kernelpress model"
                ))
            })?;
        let manifest: serde_json::Value = serde_json::from_str(text)
            .map_err(|e| Error::file(format!("{src}: manifest is not valid JSON: {e}")))?;
        let serde_json::Value::Object(mut manifest) = manifest else {
            return Err(Error::file(format!("{src}: manifest is not a JSON object")));
        };
        // The checksum covers the manifest without itself, as compact JSON with sorted keys
        // (exact for every value: floats are parsed correctly rounded and printed shortest).
        let required = manifest.remove(CHECKSUM_REQUIRED_KEY);
        let integrity = match manifest.remove(CHECKSUM_KEY) {
            None if required.is_some() => {
                return Err(Error::file(format!(
                    "{src}: the manifest says the file carries a checksum but none is there: the file was changed or corrupted after it was written; use an intact copy"
                )))
            }
            None => Integrity::Absent,
            Some(want) => {
                // The stored text with the checksum's digits zeroed, exactly as it was hashed.
                let want = want.as_str().unwrap_or("");
                let field = format!("\"{CHECKSUM_KEY}\":\"{want}\"");
                let got = if want.len() == PLACEHOLDER.len() && text.matches(&field).count() == 1 {
                    checksum(
                        &text.replacen(&field, &format!("\"{CHECKSUM_KEY}\":\"{PLACEHOLDER}\""), 1),
                        st.tensors()
                            .into_iter()
                            .map(|(k, v)| (k, dtype_name(v.dtype()), v.shape().to_vec(), v.data()))
                            .collect::<Vec<_>>()
                            .iter()
                            .map(|(k, d, s, b)| (k.as_str(), *d, s.as_slice(), *b)),
                    )
                } else {
                    "unreadable".into()
                };
                if got != want {
                    return Err(Error::file(format!(
                        "{src}: checksum mismatch (stored {want}, computed {got}): the file was changed or corrupted after it was written; use an intact copy"
                    )));
                }
                Integrity::Verified
            }
        };
        let version = manifest
            .get("format_version")
            .and_then(|v| v.as_u64())
            .ok_or_else(|| {
                Error::file(format!(
                    "{src}: manifest field 'format_version' is missing or not a whole number"
                ))
            })?;
        if !READ_VERSIONS.contains(&version) {
            return Err(Error::file(format!(
                "{src}: manifest format_version {version} is not supported by this build (reads {READ_VERSIONS:?})"
            )));
        }
        let mut tensors = BTreeMap::new();
        for (name, view) in st.tensors() {
            let raw = view.data();
            let data = match view.dtype() {
                Dtype::F64 => Data::F64(
                    raw.chunks_exact(8)
                        .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
                        .collect(),
                ),
                // Version 1 wrote float64 but read float32 too; version 2 is strict.
                Dtype::F32 if version == 1 => Data::F64(
                    raw.chunks_exact(4)
                        .map(|c| f32::from_le_bytes(c.try_into().expect("4 bytes")) as f64)
                        .collect(),
                ),
                Dtype::I32 if version >= 2 => Data::I32(
                    raw.chunks_exact(4)
                        .map(|c| i32::from_le_bytes(c.try_into().expect("4 bytes")))
                        .collect(),
                ),
                Dtype::I8 if version >= 2 => {
                    Data::I8(raw.iter().map(|b| i8::from_le_bytes([*b])).collect())
                }
                other => {
                    return Err(Error::file(format!(
                        "{src}: tensor '{name}' has dtype {other:?}; expected F64 (real values), I32 (indices) or I8 (signs)"
                    )))
                }
            };
            if let Data::F64(v) = &data {
                if let Some(i) = v.iter().position(|x| !x.is_finite()) {
                    return Err(Error::file(format!(
                        "{src}: tensor '{name}' element {i} is not finite ({})",
                        v[i]
                    )));
                }
            }
            tensors.insert(
                name,
                Tensor {
                    shape: view.shape().to_vec(),
                    data,
                },
            );
        }
        Ok(TensorFile {
            tensors,
            manifest,
            integrity,
        })
    }

    fn get(&self, name: &str, shape: &[Option<usize>], src: &str) -> Result<&Tensor> {
        let t = self
            .tensors
            .get(name)
            .ok_or_else(|| Error::file(format!("{src}: tensor '{name}' is missing")))?;
        let ok = t.shape.len() == shape.len()
            && t.shape
                .iter()
                .zip(shape)
                .all(|(a, b)| b.is_none_or(|b| *a == b));
        if !ok {
            return Err(Error::file(format!(
                "{src}: tensor '{name}' has shape {:?}; expected {}",
                t.shape,
                fmt_shape(shape)
            )));
        }
        Ok(t)
    }

    fn wrong_dtype(name: &str, t: &Tensor, want: &str, src: &str) -> Error {
        Error::file(format!(
            "{src}: tensor '{name}' has dtype {}; expected {want}",
            t.data.dtype_name()
        ))
    }

    /// A float64 tensor's values, with the expected shape (`None` entries match any size).
    pub fn f64(&self, name: &str, shape: &[Option<usize>], src: &str) -> Result<Vec<f64>> {
        let t = self.get(name, shape, src)?;
        match &t.data {
            Data::F64(v) => Ok(v.clone()),
            _ => Err(Self::wrong_dtype(name, t, "F64", src)),
        }
    }

    /// A float64 tensor with its shape.
    pub fn f64_shaped(
        &self,
        name: &str,
        shape: &[Option<usize>],
        src: &str,
    ) -> Result<(Vec<usize>, Vec<f64>)> {
        let v = self.f64(name, shape, src)?;
        Ok((self.tensors[name].shape.clone(), v))
    }

    /// An int32 tensor's values.
    pub fn i32(&self, name: &str, shape: &[Option<usize>], src: &str) -> Result<Vec<i32>> {
        let t = self.get(name, shape, src)?;
        match &t.data {
            Data::I32(v) => Ok(v.clone()),
            _ => Err(Self::wrong_dtype(name, t, "I32", src)),
        }
    }

    /// An int8 tensor's values.
    pub fn i8(&self, name: &str, shape: &[Option<usize>], src: &str) -> Result<Vec<i8>> {
        let t = self.get(name, shape, src)?;
        match &t.data {
            Data::I8(v) => Ok(v.clone()),
            _ => Err(Self::wrong_dtype(name, t, "I8", src)),
        }
    }

    /// The shape of a tensor, if present.
    pub fn shape(&self, name: &str) -> Option<&[usize]> {
        self.tensors.get(name).map(|t| t.shape.as_slice())
    }

    /// A string field of the manifest.
    pub fn get_str(&self, key: &str, src: &str) -> Result<String> {
        str_field(&self.manifest, key, src)
    }

    /// An unsigned integer field of the manifest.
    pub fn get_u64(&self, key: &str, src: &str) -> Result<u64> {
        u64_field(&self.manifest, key, src)
    }
}

/// A string field of a JSON object.
pub fn str_field(
    m: &serde_json::Map<String, serde_json::Value>,
    key: &str,
    src: &str,
) -> Result<String> {
    m.get(key)
        .and_then(|v| v.as_str())
        .map(|s| s.to_string())
        .ok_or_else(|| Error::file(format!("{src}: field '{key}' is missing or not a string")))
}

/// An unsigned integer field of a JSON object.
pub fn u64_field(
    m: &serde_json::Map<String, serde_json::Value>,
    key: &str,
    src: &str,
) -> Result<u64> {
    m.get(key).and_then(|v| v.as_u64()).ok_or_else(|| {
        Error::file(format!(
            "{src}: field '{key}' is missing or not a whole number"
        ))
    })
}

/// A finite number field of a JSON object.
pub fn f64_field(
    m: &serde_json::Map<String, serde_json::Value>,
    key: &str,
    src: &str,
) -> Result<f64> {
    m.get(key)
        .and_then(|v| v.as_f64())
        .filter(|v| v.is_finite())
        .ok_or_else(|| {
            Error::file(format!(
                "{src}: field '{key}' is missing or not a finite number"
            ))
        })
}

fn fmt_shape(shape: &[Option<usize>]) -> String {
    let parts: Vec<String> = shape
        .iter()
        .map(|s| s.map(|v| v.to_string()).unwrap_or_else(|| "_".into()))
        .collect();
    format!("[{}]", parts.join(", "))
}

//! The on-disk container: one safetensors file, float64 tensors named by role, and a JSON
//! manifest stored as a string under the `__metadata__` key [`MANIFEST_KEY`].

use crate::data::{read_bytes, write_atomic};
use crate::{Error, Result};
use safetensors::tensor::{Dtype, SafeTensors, TensorView};
use std::collections::{BTreeMap, HashMap};
use std::path::Path;

/// The `__metadata__` key that holds the JSON manifest.
pub const MANIFEST_KEY: &str = "kernelpress";

/// The manifest format version this build writes and reads.
pub const FORMAT_VERSION: u64 = 1;

/// Largest model file read (bytes); larger files are refused before reading.
pub const MAX_FILE_BYTES: u64 = 8 << 30;

/// Named float64 tensors plus a JSON manifest.
#[derive(Debug, Clone, Default)]
pub struct TensorFile {
    /// Tensors by name: shape and row-major values.
    pub tensors: BTreeMap<String, (Vec<usize>, Vec<f64>)>,
    /// The manifest.
    pub manifest: serde_json::Map<String, serde_json::Value>,
}

impl TensorFile {
    /// Adds a tensor.
    pub fn put(&mut self, name: &str, shape: Vec<usize>, data: Vec<f64>) {
        debug_assert_eq!(shape.iter().product::<usize>(), data.len());
        self.tensors.insert(name.to_string(), (shape, data));
    }

    /// Serialises to safetensors bytes.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        let raw: Vec<(String, Vec<usize>, Vec<u8>)> = self
            .tensors
            .iter()
            .map(|(k, (s, d))| {
                (
                    k.clone(),
                    s.clone(),
                    d.iter().flat_map(|v| v.to_le_bytes()).collect(),
                )
            })
            .collect();
        let views: Vec<(String, TensorView)> = raw
            .iter()
            .map(|(k, s, b)| {
                (
                    k.clone(),
                    TensorView::new(Dtype::F64, s.clone(), b).expect("sizes consistent"),
                )
            })
            .collect();
        let mut meta = HashMap::new();
        meta.insert(
            MANIFEST_KEY.to_string(),
            serde_json::Value::Object(self.manifest.clone()).to_string(),
        );
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
                return Err(Error::input(format!(
                    "{src}: file is {} bytes, larger than the {} bytes a model file may have",
                    m.len(),
                    MAX_FILE_BYTES
                )));
            }
        }
        let bytes = read_bytes(path)?;
        Self::from_bytes(&bytes, &src)
    }

    /// Parses safetensors bytes; `src` names them in errors.
    pub fn from_bytes(bytes: &[u8], src: &str) -> Result<TensorFile> {
        if bytes.is_empty() {
            return Err(Error::input(format!(
                "{src}: file is empty; expected a kernelpress model (safetensors)"
            )));
        }
        if bytes.len() < 8 {
            return Err(Error::input(format!(
                "{src}: truncated: {} bytes, a safetensors file starts with an 8-byte header size",
                bytes.len()
            )));
        }
        let n = u64::from_le_bytes(bytes[..8].try_into().unwrap());
        if n > (bytes.len() as u64 - 8) {
            return Err(Error::input(format!(
                "{src}: header claims {n} bytes but the file has only {} after the size field (truncated or not a safetensors file)",
                bytes.len() - 8
            )));
        }
        let st = SafeTensors::deserialize(bytes).map_err(|e| {
            Error::input(format!(
                "{src}: not a valid safetensors file ({e:?}); the file may be truncated or corrupted"
            ))
        })?;
        let (_, meta) = SafeTensors::read_metadata(bytes)
            .map_err(|e| Error::input(format!("{src}: bad safetensors header ({e:?})")))?;
        let text = meta
            .metadata()
            .as_ref()
            .and_then(|m| m.get(MANIFEST_KEY))
            .ok_or_else(|| {
                Error::input(format!(
                    "{src}: safetensors file has no '{MANIFEST_KEY}' manifest in __metadata__; not a kernelpress model"
                ))
            })?;
        let manifest: serde_json::Value = serde_json::from_str(text)
            .map_err(|e| Error::input(format!("{src}: manifest is not valid JSON: {e}")))?;
        let manifest = match manifest {
            serde_json::Value::Object(m) => m,
            _ => {
                return Err(Error::input(format!(
                    "{src}: manifest is not a JSON object"
                )))
            }
        };
        let mut tensors = BTreeMap::new();
        for (name, view) in st.tensors() {
            let data: Vec<f64> = match view.dtype() {
                Dtype::F64 => view
                    .data()
                    .chunks_exact(8)
                    .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
                    .collect(),
                Dtype::F32 => view
                    .data()
                    .chunks_exact(4)
                    .map(|c| f32::from_le_bytes(c.try_into().unwrap()) as f64)
                    .collect(),
                other => {
                    return Err(Error::input(format!(
                        "{src}: tensor '{name}' has dtype {other:?}; expected F64 or F32"
                    )))
                }
            };
            if let Some(i) = data.iter().position(|v| !v.is_finite()) {
                return Err(Error::input(format!(
                    "{src}: tensor '{name}' element {i} is not finite ({})",
                    data[i]
                )));
            }
            tensors.insert(name, (view.shape().to_vec(), data));
        }
        let tf = TensorFile { tensors, manifest };
        let version = tf.get_u64("format_version", src)?;
        if version != FORMAT_VERSION {
            return Err(Error::input(format!(
                "{src}: manifest format_version {version} is not supported by this build (reads {FORMAT_VERSION})"
            )));
        }
        Ok(tf)
    }

    /// A tensor by name with the expected shape (`None` entries match any size).
    pub fn tensor(
        &self,
        name: &str,
        shape: &[Option<usize>],
        src: &str,
    ) -> Result<(Vec<usize>, Vec<f64>)> {
        let (s, d) = self
            .tensors
            .get(name)
            .ok_or_else(|| Error::input(format!("{src}: tensor '{name}' is missing")))?;
        let ok =
            s.len() == shape.len() && s.iter().zip(shape).all(|(a, b)| b.is_none_or(|b| *a == b));
        if !ok {
            return Err(Error::input(format!(
                "{src}: tensor '{name}' has shape {s:?}; expected {}",
                fmt_shape(shape)
            )));
        }
        Ok((s.clone(), d.clone()))
    }

    /// A string field of the manifest.
    pub fn get_str(&self, key: &str, src: &str) -> Result<String> {
        self.manifest
            .get(key)
            .and_then(|v| v.as_str())
            .map(|s| s.to_string())
            .ok_or_else(|| {
                Error::input(format!(
                    "{src}: manifest field '{key}' is missing or not a string"
                ))
            })
    }

    /// An unsigned integer field of the manifest.
    pub fn get_u64(&self, key: &str, src: &str) -> Result<u64> {
        self.manifest
            .get(key)
            .and_then(|v| v.as_u64())
            .ok_or_else(|| {
                Error::input(format!(
                    "{src}: manifest field '{key}' is missing or not a whole number"
                ))
            })
    }
}

fn fmt_shape(shape: &[Option<usize>]) -> String {
    let parts: Vec<String> = shape
        .iter()
        .map(|s| s.map(|v| v.to_string()).unwrap_or_else(|| "_".into()))
        .collect();
    format!("[{}]", parts.join(", "))
}

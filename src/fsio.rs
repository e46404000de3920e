//! Whole-file reads and atomic writes (temporary file in the same folder, then rename).
//! A leaf: it depends on nothing in the crate but the error type.

use crate::error::io_error;
use crate::{Error, Result};
use std::path::Path;

/// Writes `bytes` to `path` atomically: a temporary file in the same folder, then rename.
/// A failure leaves no partial file behind.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    if !dir.is_dir() {
        return Err(Error::input(format!(
            "{}: folder {} does not exist",
            path.display(),
            dir.display()
        )));
    }
    let name = path
        .file_name()
        .ok_or_else(|| Error::input(format!("{}: not a file path", path.display())))?;
    let tmp = dir.join(format!(
        ".{}.tmp{}",
        name.to_string_lossy(),
        std::process::id()
    ));
    let res = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        Ok(())
    })();
    if let Err(e) = res {
        let _ = std::fs::remove_file(&tmp);
        return Err(io_error(path, "write", e));
    }
    std::fs::rename(&tmp, path).map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        io_error(path, "write", e)
    })
}

/// Reads a whole file, with an error naming it.
pub fn read_bytes(path: &Path) -> Result<Vec<u8>> {
    if path.is_dir() {
        return Err(Error::input(format!(
            "{}: is a folder, expected a file",
            path.display()
        )));
    }
    std::fs::read(path).map_err(|e| io_error(path, "read", e))
}

//! Whole-file reads and atomic writes (temporary file in the same folder, then rename).
//! A leaf: it depends on nothing in the crate but the error type.

use crate::error::io_error;
use crate::{Error, Result};
use std::path::Path;

/// The temporary name `path` is written under before it is renamed: `.NAME.tmpPID` in
/// the same folder (so that a signal handler can find and remove it).
pub fn temp_path(path: &Path) -> Result<std::path::PathBuf> {
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
    Ok(dir.join(format!(
        ".{}.tmp{}",
        name.to_string_lossy(),
        std::process::id()
    )))
}

fn write_temp(path: &Path, bytes: &[u8]) -> Result<std::path::PathBuf> {
    use std::io::Write;
    let tmp = temp_path(path)?;
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
    Ok(tmp)
}

/// Writes `bytes` to `path` atomically: a temporary file in the same folder, then rename.
/// A failure leaves no partial file behind.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_all_atomic(&[(path, bytes)])
}

/// Writes several files all or none: every file is first written to its temporary name;
/// only when all succeeded are they renamed into place, one after the other (on a failure
/// every temporary file is removed and nothing is published).
pub fn write_all_atomic(items: &[(&Path, &[u8])]) -> Result<()> {
    let mut temps = Vec::with_capacity(items.len());
    for (p, b) in items {
        match write_temp(p, b) {
            Ok(t) => temps.push(t),
            Err(e) => {
                for t in &temps {
                    let _ = std::fs::remove_file(t);
                }
                return Err(e);
            }
        }
    }
    for (i, ((p, _), t)) in items.iter().zip(&temps).enumerate() {
        if let Err(e) = std::fs::rename(t, p) {
            for t in &temps[i..] {
                let _ = std::fs::remove_file(t);
            }
            return Err(io_error(p, "write", e));
        }
    }
    Ok(())
}

/// Reads a whole file, with an error naming it.
pub fn read_bytes(path: &Path) -> Result<Vec<u8>> {
    if path.is_dir() {
        return Err(Error::input(format!(
            "{}: is a folder, expected a file",
            path.display()
        )));
    }
    let meta = std::fs::metadata(path).map_err(|e| io_error(path, "read", e))?;
    if !meta.is_file() {
        return Err(Error::input(format!(
            "{}: is not a regular file (a device, a pipe or a socket); give a file",
            path.display()
        )));
    }
    let limit = crate::limits::max_memory();
    if meta.len() > limit {
        return Err(Error::input(format!(
            "{}: is {} bytes, more than the memory limit of {limit} bytes (raise it with --max-memory)",
            path.display(),
            meta.len()
        )));
    }
    std::fs::read(path).map_err(|e| io_error(path, "read", e))
}

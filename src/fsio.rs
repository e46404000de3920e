//! Whole-file reads and outputs that never destroy what they replace. A leaf: it depends on
//! nothing in the crate but the error type and the memory ceiling.
//!
//! What an output path names decides how it is written:
//! - a new path or a regular file: written to a temporary file in the same folder, created
//!   exclusively under an unpredictable name (`.NAME.<random>.tmpPID`, mode 0666 less the
//!   umask), synced, then renamed over the path — readers see the old file or the new one;
//! - a symbolic link: resolved, and its final target written as above (the link stays);
//!   a link to nothing is refused;
//! - a character device or a FIFO (`/dev/null`, `/dev/stdout`, a named pipe), and `-`
//!   (standard output): written as a stream, never replaced;
//! - a folder, a socket or a block device: refused.

use crate::error::io_error;
use crate::{Error, Result};
use std::io::Write;
use std::path::{Path, PathBuf};

/// How one output is written.
enum Target {
    /// Replaced atomically (the path to replace: the link's target for a link).
    Replace(PathBuf),
    /// Written as a stream (a device, a FIFO, standard output).
    Stream(Option<PathBuf>),
}

fn folder_of(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// What `path` names, checked; nothing is written.
fn target(path: &Path) -> Result<Target> {
    if path.as_os_str() == "-" {
        return Ok(Target::Stream(None));
    }
    let resolved = match std::fs::symlink_metadata(path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            let dir = folder_of(path);
            if !dir.is_dir() {
                return Err(Error::input(format!(
                    "{}: folder {} does not exist",
                    path.display(),
                    dir.display()
                )));
            }
            return Ok(Target::Replace(path.to_path_buf()));
        }
        Err(e) => return Err(io_error(path, "write", e)),
        Ok(m) if m.file_type().is_symlink() => std::fs::canonicalize(path).map_err(|_| {
            Error::input(format!(
                "{}: is a symbolic link to a file that does not exist; give the path it should point to",
                path.display()
            ))
        })?,
        Ok(_) => path.to_path_buf(),
    };
    let m = std::fs::metadata(&resolved).map_err(|e| io_error(path, "write", e))?;
    let ft = m.file_type();
    if ft.is_file() {
        return Ok(Target::Replace(resolved));
    }
    if ft.is_dir() {
        return Err(Error::input(format!(
            "{}: is a folder; expected a file path",
            path.display()
        )));
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        if ft.is_char_device() || ft.is_fifo() {
            return Ok(Target::Stream(Some(resolved)));
        }
    }
    Err(Error::input(format!(
        "{}: is not a regular file, a character device or a pipe; refusing to write to it",
        path.display()
    )))
}

/// Writes `bytes` to a new temporary file beside `path` (exclusive, unpredictable name).
fn write_temp(path: &Path, bytes: &[u8]) -> Result<tempfile::TempPath> {
    let dir = folder_of(path);
    let name = path
        .file_name()
        .ok_or_else(|| Error::input(format!("{}: not a file path", path.display())))?;
    let prefix = format!(".{}.", name.to_string_lossy());
    let suffix = format!(".tmp{}", std::process::id());
    let mut b = tempfile::Builder::new();
    b.prefix(&prefix).suffix(&suffix).rand_bytes(12);
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        b.permissions(std::fs::Permissions::from_mode(0o666));
    }
    let mut f = b
        .tempfile_in(&dir)
        .map_err(|e| io_error(path, "write", e))?;
    f.write_all(bytes)
        .and_then(|_| f.as_file().sync_all())
        .map_err(|e| io_error(path, "write", e))?;
    Ok(f.into_temp_path())
}

/// Checks, before any work, that `path` can be written as an output (`folder`: as a folder
/// written whole): what it names is acceptable (see the module notes) and its folder takes
/// a new file (a temporary one is created and removed). An unwritable output is bad input
/// (exit code 2) whatever the format.
pub fn check_writable(path: &Path, folder: bool) -> Result<()> {
    let dir = if folder {
        folder_of(path)
    } else {
        match target(path)? {
            Target::Stream(_) => return Ok(()),
            Target::Replace(p) => folder_of(&p),
        }
    };
    tempfile::Builder::new()
        .prefix(".kernelpress-check.")
        .suffix(&format!(".tmp{}", std::process::id()))
        .tempfile_in(&dir)
        .map(drop)
        .map_err(|e| {
            Error::input(format!(
                "{}: cannot write in folder {} ({}); choose a writable place",
                path.display(),
                dir.display(),
                e.kind()
            ))
        })
}

/// Writes `bytes` to `path` without destroying what `path` names (see the module notes). A
/// failure leaves no partial file behind.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_all_atomic(&[(path, bytes)])
}

/// Writes several files all or none: every output is checked and every regular file first
/// written to its temporary name; only when all succeeded are they renamed into place, one
/// after the other, and then the streams written (on a failure every temporary file is
/// removed and nothing is published).
pub fn write_all_atomic(items: &[(&Path, &[u8])]) -> Result<()> {
    let targets: Vec<Target> = items
        .iter()
        .map(|(p, _)| target(p))
        .collect::<Result<_>>()?;
    let mut temps = Vec::new();
    for ((p, b), t) in items.iter().zip(&targets) {
        if let Target::Replace(real) = t {
            // Dropping the collected temporary paths on an error removes them.
            temps.push((write_temp(real, b)?, real.clone(), *p));
        }
    }
    for (tmp, real, p) in temps {
        tmp.persist(&real)
            .map_err(|e| io_error(p, "write", e.error))?;
    }
    for ((p, b), t) in items.iter().zip(&targets) {
        if let Target::Stream(dev) = t {
            let res = match dev {
                None => {
                    let mut o = std::io::stdout().lock();
                    o.write_all(b).and_then(|_| o.flush())
                }
                Some(d) => std::fs::OpenOptions::new()
                    .write(true)
                    .open(d)
                    .and_then(|mut f| f.write_all(b)),
            };
            res.map_err(|e| io_error(p, "write", e))?;
        }
    }
    Ok(())
}

/// Writes the files `(name, bytes)` as the folder `dir`, all or none: they are written
/// into a new temporary folder beside it (exclusive, unpredictable name), synced, and the
/// folder renamed into place in one step, so that a reader never sees some new files
/// beside some old ones. An existing `dir` is refused unless `replace` is true; then it is
/// moved aside, the new folder renamed in, and the old one removed. Returns the paths
/// written. A failure or an interrupt leaves at most a hidden temporary folder, which the
/// CLI's signal handler removes.
pub fn write_folder_atomic(
    dir: &Path,
    files: &[(String, Vec<u8>)],
    replace: bool,
) -> Result<Vec<PathBuf>> {
    let exists = match std::fs::symlink_metadata(dir) {
        Ok(m) if m.is_dir() => true,
        Ok(_) => {
            return Err(Error::input(format!(
                "{}: exists and is not a folder; this format writes a folder",
                dir.display()
            )))
        }
        Err(_) => false,
    };
    if exists && !replace {
        return Err(Error::input(format!(
            "{}: the folder exists; give a new folder, or --replace-folder to replace it whole",
            dir.display()
        )));
    }
    let parent = folder_of(dir);
    if !parent.is_dir() {
        return Err(Error::input(format!(
            "{}: folder {} does not exist",
            dir.display(),
            parent.display()
        )));
    }
    let name = dir
        .file_name()
        .ok_or_else(|| Error::input(format!("{}: not a folder path", dir.display())))?
        .to_string_lossy()
        .to_string();
    let suffix = format!(".tmp{}", std::process::id());
    let tmp = tempfile::Builder::new()
        .prefix(&format!(".{name}."))
        .suffix(&suffix)
        .rand_bytes(12)
        .tempdir_in(&parent)
        .map_err(|e| io_error(dir, "write", e))?;
    for (f, bytes) in files {
        let p = tmp.path().join(f);
        std::fs::File::create(&p)
            .and_then(|mut h| h.write_all(bytes).and_then(|_| h.sync_all()))
            .map_err(|e| io_error(&dir.join(f), "write", e))?;
    }
    let tmp = tmp.keep();
    let old = if exists {
        let aside = parent.join(format!(".{name}.old{suffix}"));
        std::fs::rename(dir, &aside).map_err(|e| {
            let _ = std::fs::remove_dir_all(&tmp);
            io_error(dir, "replace", e)
        })?;
        Some(aside)
    } else {
        None
    };
    if let Err(e) = std::fs::rename(&tmp, dir) {
        let _ = std::fs::remove_dir_all(&tmp);
        if let Some(o) = &old {
            let _ = std::fs::rename(o, dir);
        }
        return Err(io_error(dir, "write", e));
    }
    if let Some(o) = old {
        let _ = std::fs::remove_dir_all(o);
    }
    Ok(files.iter().map(|(f, _)| dir.join(f)).collect())
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

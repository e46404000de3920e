//! The machine profile of the cost model, measured once and kept in the user's cache
//! directory (`$KERNELPRESS_CACHE_DIR`, else `$XDG_CACHE_HOME/kernelpress`, else
//! `~/.cache/kernelpress`) with the CPU it was measured on.

use super::progress;
use kernelpress::cost::MachineProfile;
use kernelpress::Result;
use std::path::PathBuf;

fn cache_file() -> Option<PathBuf> {
    let dir = std::env::var_os("KERNELPRESS_CACHE_DIR")
        .map(PathBuf::from)
        .or_else(|| {
            std::env::var_os("XDG_CACHE_HOME").map(|d| PathBuf::from(d).join("kernelpress"))
        })
        .or_else(|| {
            std::env::var_os("HOME").map(|h| PathBuf::from(h).join(".cache/kernelpress"))
        })?;
    Some(dir.join("machine.json"))
}

/// The cached profile when it belongs to this CPU, else a fresh measurement (stored for
/// next time; a cache that cannot be written only costs the measurement again).
pub(crate) fn profile(recalibrate: bool) -> Result<MachineProfile> {
    let path = cache_file();
    if !recalibrate {
        if let Some(p) = &path {
            if let Ok(text) = std::fs::read_to_string(p) {
                match MachineProfile::from_json(&text, &p.display().to_string()) {
                    Ok(m) if m.fits_this_machine() => return Ok(m),
                    Ok(_) => progress::note(format!(
                        "{}: measured on another CPU or version; measuring this machine again",
                        p.display()
                    )),
                    Err(e) => progress::note(format!("{e}; measuring this machine again")),
                }
            }
        }
    }
    let m = MachineProfile::measure(rayon::current_num_threads())?;
    let stored = path.as_ref().and_then(|p| {
        std::fs::create_dir_all(p.parent()?).ok()?;
        kernelpress::data::write_all_atomic(&[(p.as_path(), m.to_json().as_bytes())]).ok()?;
        Some(p.display().to_string())
    });
    progress::note(format!(
        "measured this machine's speeds in {:.0} ms{}",
        m.measure_ms,
        stored
            .map(|s| format!(" (kept in {s}; --recalibrate measures again)"))
            .unwrap_or_default()
    ));
    Ok(m)
}

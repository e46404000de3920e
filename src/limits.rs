//! Limits checked before anything is allocated from a size that came from a file, a flag
//! or an expression. The memory ceiling defaults to half of the machine's physical memory
//! (read from `/proc/meminfo`; 8 GiB where that cannot be read) and can be set by the
//! caller ([`set_max_memory`], the CLI's `--max-memory`). A caller that counts the
//! process's heap ([`set_usage_probe`]: the CLI installs a counting allocator) makes the
//! ceiling a budget for the whole process: every sized allocation is checked against the
//! ceiling less what is already in use. These are the library's only process-wide values,
//! and only the caller sets them.

use crate::{Error, Result};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::OnceLock;

static MAX_MEMORY: AtomicU64 = AtomicU64::new(0);
static USAGE: OnceLock<fn() -> u64> = OnceLock::new();

/// Installs `probe`, which returns the bytes the process has allocated now; from then on
/// [`check_alloc`] counts them against the ceiling. Set once (later calls are ignored).
pub fn set_usage_probe(probe: fn() -> u64) {
    let _ = USAGE.set(probe);
}

/// Bytes in use by the process according to the installed probe (0 without one).
pub fn in_use() -> u64 {
    USAGE.get().map(|f| f()).unwrap_or(0)
}

fn physical_memory() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = text.lines().find(|l| l.starts_with("MemTotal:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}

/// The memory ceiling in bytes.
pub fn max_memory() -> u64 {
    match MAX_MEMORY.load(Ordering::Relaxed) {
        0 => physical_memory().map(|m| m / 2).unwrap_or(8 << 30),
        v => v,
    }
}

/// Sets the memory ceiling (bytes, > 0).
pub fn set_max_memory(bytes: u64) {
    MAX_MEMORY.store(bytes.max(1), Ordering::Relaxed);
}

/// Checks that `count` values of `elem` bytes fit under the ceiling; `what` names them.
///
/// ```
/// use kernelpress::limits::check_alloc;
/// assert!(check_alloc(1000, 8, "a test array").is_ok());
/// assert!(check_alloc(u64::MAX / 2, 8, "a huge array").is_err());
/// ```
pub fn check_alloc(count: u64, elem: u64, what: &str) -> Result<()> {
    let bytes = count.saturating_mul(elem);
    let limit = max_memory();
    let used = in_use();
    if bytes > limit {
        return Err(Error::input(format!(
            "{what} would need {bytes} bytes, more than the memory limit of {limit} bytes (raise it with --max-memory)"
        )));
    }
    if bytes.saturating_add(used) > limit {
        return Err(Error::input(format!(
            "{what} would need {bytes} bytes with {used} bytes already in use, more than the memory limit of {limit} bytes (raise it with --max-memory)"
        )));
    }
    Ok(())
}

/// Parses a size such as `4G`, `512M`, `100000K` or a plain byte count.
pub fn parse_size(s: &str) -> Result<u64> {
    let t = s.trim();
    let (num, mul) = match t.chars().last() {
        Some('G' | 'g') => (&t[..t.len() - 1], 1u64 << 30),
        Some('M' | 'm') => (&t[..t.len() - 1], 1 << 20),
        Some('K' | 'k') => (&t[..t.len() - 1], 1 << 10),
        _ => (t, 1),
    };
    num.parse::<f64>()
        .ok()
        .filter(|v| *v > 0.0 && v.is_finite())
        .map(|v| (v * mul as f64) as u64)
        .filter(|v| *v > 0)
        .ok_or_else(|| {
            Error::input(format!(
                "--max-memory '{s}': expected a positive size such as 4G, 512M or 100000"
            ))
        })
}

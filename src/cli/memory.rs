//! `--max-memory` for the whole process. The library checks every size it takes from a
//! file, a flag or an expression against the ceiling less the memory the process already
//! holds (its resident set, read from `/proc/self/statm`, installed here as the library's
//! usage probe), so an oversized request is refused before anything is allocated. What no
//! single check sees — copies, buffers, a third-party library's scratch space — a watchdog
//! thread catches: it reads the resident set every 2 ms and, once it is above the ceiling,
//! ends the command with exit 2 and a message (temporary files removed; outputs are
//! published by rename, so nothing is half-written). Resident memory, not reserved address
//! space, is what is bounded: the matrix-product library reserves about 1 GiB per thread
//! that it never touches.

use std::time::Duration;

/// The process's resident memory in bytes (0 where `/proc/self/statm` cannot be read).
pub(crate) fn resident() -> u64 {
    let Ok(text) = std::fs::read_to_string("/proc/self/statm") else {
        return 0;
    };
    let pages: u64 = text
        .split_whitespace()
        .nth(1)
        .and_then(|v| v.parse().ok())
        .unwrap_or(0);
    pages * page_size()
}

fn page_size() -> u64 {
    // The kernel's page size is 4 KiB on the machines this runs on; /proc/self/smaps
    // would say otherwise, and `KernelPageSize` there is read once.
    static SIZE: std::sync::OnceLock<u64> = std::sync::OnceLock::new();
    *SIZE.get_or_init(|| {
        std::fs::read_to_string("/proc/self/smaps")
            .ok()
            .and_then(|t| {
                t.lines()
                    .find(|l| l.starts_with("KernelPageSize:"))
                    .and_then(|l| {
                        l.split_whitespace()
                            .nth(1)
                            .and_then(|v| v.parse::<u64>().ok())
                    })
            })
            .map(|kb| kb * 1024)
            .unwrap_or(4096)
    })
}

/// Installs the resident-set probe and starts the watchdog for a ceiling of `limit` bytes.
pub(crate) fn watch(limit: u64) {
    kernelpress::limits::set_usage_probe(resident);
    let _ = std::thread::Builder::new()
        .name("kp-memory-watch".into())
        .spawn(move || loop {
            let r = resident();
            if r > limit {
                exceeded(r, limit);
            }
            std::thread::sleep(Duration::from_millis(2));
        });
}

/// Says the ceiling was crossed, removes this process's temporary files, exits with 2.
fn exceeded(resident: u64, limit: u64) -> ! {
    eprintln!(
        "error: the memory limit of {} (--max-memory) was exceeded ({} resident); raise --max-memory, or give fewer rows, features or columns",
        kernelpress::report::format_bytes(limit as usize),
        kernelpress::report::format_bytes(resident as usize)
    );
    super::remove_temporaries();
    std::process::exit(2);
}

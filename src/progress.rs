//! Progress bars on stderr, hidden when stderr is not a terminal or when quiet.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::sync::atomic::{AtomicBool, Ordering};

static QUIET: AtomicBool = AtomicBool::new(false);

/// Silences every progress bar and log line (the CLI's `--quiet`).
pub fn set_quiet(q: bool) {
    QUIET.store(q, Ordering::Relaxed);
}

/// True when progress and logs are silenced.
pub fn is_quiet() -> bool {
    QUIET.load(Ordering::Relaxed)
}

/// A progress bar of `len` steps labelled `what`; hidden when not on a terminal.
pub fn bar(len: u64, what: &str) -> ProgressBar {
    let pb = ProgressBar::new(len);
    if is_quiet() || !std::io::stderr().is_terminal() {
        pb.set_draw_target(ProgressDrawTarget::hidden());
    } else {
        pb.set_draw_target(ProgressDrawTarget::stderr());
    }
    pb.set_style(
        ProgressStyle::with_template("{msg:>14} [{bar:30}] {pos}/{len} ({elapsed}, eta {eta})")
            .unwrap()
            .progress_chars("=> "),
    );
    pb.set_message(what.to_string());
    pb
}

/// A log line on stderr unless quiet.
pub fn log(msg: impl AsRef<str>) {
    if !is_quiet() {
        eprintln!("{}", msg.as_ref());
    }
}

/// A warning on stderr; warnings are printed even when quiet.
pub fn warn(msg: impl AsRef<str>) {
    eprintln!("warning: {}", msg.as_ref());
}

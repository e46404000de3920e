//! Progress bars on stderr, hidden when stderr is not a terminal or when quiet, and the
//! [`Bars`] observer that shows the library's progress and notes.

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

/// A warning on stderr; warnings are printed even when quiet.
pub fn warn(msg: impl AsRef<str>) {
    eprintln!("warning: {}", msg.as_ref());
}

/// Shows library progress as bars (on a terminal) and notes as warnings.
#[derive(Default)]
pub struct Bars {
    bar: std::sync::Mutex<Option<ProgressBar>>,
}

impl kernelpress::observe::Observer for Bars {
    fn stage(&self, name: &str, total: u64) {
        let mut b = self.bar.lock().expect("progress lock");
        if let Some(old) = b.take() {
            old.finish_and_clear();
        }
        *b = Some(bar(total.max(1), name));
    }
    fn advance(&self, n: u64) {
        if let Some(b) = self.bar.lock().expect("progress lock").as_ref() {
            b.inc(n);
        }
    }
    fn finish(&self) {
        if let Some(b) = self.bar.lock().expect("progress lock").take() {
            b.finish_and_clear();
        }
    }
    fn note(&self, message: &str) {
        warn(message);
    }
}

//! Progress on stderr: bars on a terminal; in logs (stderr not a terminal) one plain line
//! when a stage starts, a heartbeat every few seconds on long stages, and one when it ends;
//! nothing with `--quiet` (warnings still print). [`Bars`] shows the library's progress and
//! notes this way.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

static QUIET: AtomicBool = AtomicBool::new(false);

/// Seconds between heartbeat lines in logs.
const HEARTBEAT: Duration = Duration::from_secs(5);

/// Silences every progress bar and log line (the CLI's `--quiet`).
pub fn set_quiet(q: bool) {
    QUIET.store(q, Ordering::Relaxed);
}

/// True when progress and logs are silenced.
pub fn is_quiet() -> bool {
    QUIET.load(Ordering::Relaxed)
}

fn terminal() -> bool {
    std::io::stderr().is_terminal()
}

/// One stage of work of `len` steps: a bar on a terminal, plain lines in logs.
pub struct Stage {
    bar: Option<ProgressBar>,
    name: String,
    len: u64,
    done: u64,
    start: Instant,
    last: Instant,
}

impl Stage {
    /// Starts a stage.
    pub fn new(len: u64, name: &str) -> Stage {
        let now = Instant::now();
        let bar = if is_quiet() {
            None
        } else if terminal() {
            let pb = ProgressBar::new(len.max(1));
            pb.set_draw_target(ProgressDrawTarget::stderr());
            // Length unknown (a streamed pass): a count instead of a bar.
            let template = if len == 0 {
                "{msg:>14} {pos} done ({elapsed})"
            } else {
                "{msg:>14} [{bar:30}] {pos}/{len} ({elapsed}, eta {eta})"
            };
            pb.set_style(
                ProgressStyle::with_template(template)
                    .expect("template")
                    .progress_chars("=> "),
            );
            pb.set_message(name.to_string());
            Some(pb)
        } else {
            if len == 0 {
                // Length unknown (a streamed pass): the heartbeat lines count what is done.
                eprintln!("[kernelpress] {name}: started");
            } else {
                eprintln!(
                    "[kernelpress] {name}: started ({len} step{})",
                    if len == 1 { "" } else { "s" }
                );
            }
            None
        };
        Stage {
            bar,
            name: name.to_string(),
            len,
            done: 0,
            start: now,
            last: now,
        }
    }

    /// `n` more steps done.
    pub fn inc(&mut self, n: u64) {
        self.done += n;
        if let Some(b) = &self.bar {
            b.inc(n);
        } else if !is_quiet() && self.last.elapsed() >= HEARTBEAT {
            self.last = Instant::now();
            let secs = self.start.elapsed().as_secs_f64();
            let eta = if self.done > 0 && self.done < self.len {
                format!(
                    ", about {:.0} s left",
                    secs / self.done as f64 * (self.len - self.done) as f64
                )
            } else {
                String::new()
            };
            eprintln!(
                "[kernelpress] {}: {}/{} after {secs:.0} s{eta}",
                self.name, self.done, self.len
            );
        }
    }

    /// Ends the stage.
    pub fn finish(self) {
        match self.bar {
            Some(b) => b.finish_and_clear(),
            None if !is_quiet() => eprintln!(
                "[kernelpress] {}: done in {:.1} s",
                self.name,
                self.start.elapsed().as_secs_f64()
            ),
            None => {}
        }
    }
}

/// A stage of `len` steps labelled `what`.
pub fn bar(len: u64, what: &str) -> Stage {
    Stage::new(len, what)
}

/// A note on stderr (what the tool did on the user's behalf), unless quiet.
pub fn note(msg: impl AsRef<str>) {
    if !is_quiet() {
        eprintln!("note: {}", msg.as_ref());
    }
}

/// A warning on stderr; warnings are printed even when quiet.
pub fn warn(msg: impl AsRef<str>) {
    eprintln!("warning: {}", msg.as_ref());
}

/// Shows library progress as stages and notes as warnings.
#[derive(Default)]
pub struct Bars {
    stage: Mutex<Option<Stage>>,
}

impl kernelpress::observe::Observer for Bars {
    fn stage(&self, name: &str, total: u64) {
        let mut s = self.stage.lock().expect("progress lock");
        if let Some(old) = s.take() {
            old.finish();
        }
        *s = Some(Stage::new(total, name));
    }
    fn advance(&self, n: u64) {
        if let Some(s) = self.stage.lock().expect("progress lock").as_mut() {
            s.inc(n);
        }
    }
    fn finish(&self) {
        if let Some(s) = self.stage.lock().expect("progress lock").take() {
            s.finish();
        }
    }
    fn note(&self, message: &str) {
        warn(message);
    }
}

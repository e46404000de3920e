//! Progress and notes, reported to the caller. The library never prints and never touches
//! process-wide state: long operations take an [`Observer`] and tell it which stage they are
//! in, how far along they are, and what the user should know (warnings). The command line
//! turns these into progress bars or log lines; library users may ignore them ([`Silent`]).
//!
//! ```
//! use kernelpress::observe::{Observer, Silent};
//! use std::sync::Mutex;
//! struct Notes(Mutex<Vec<String>>);
//! impl Observer for Notes {
//!     fn note(&self, message: &str) {
//!         self.0.lock().unwrap().push(message.to_string());
//!     }
//! }
//! let n = Notes(Mutex::new(vec![]));
//! n.stage("distilling", 3);
//! n.note("ridge retried");
//! assert_eq!(n.0.lock().unwrap().len(), 1);
//! Silent.note("ignored");
//! ```

/// Receives progress and notes from long library calls. Every method has a default that
/// does nothing; calls may come from several threads.
pub trait Observer: Sync {
    /// A new stage of `total` units of work begins (0 when unknown).
    fn stage(&self, _name: &str, _total: u64) {}
    /// `n` more units of the current stage are done.
    fn advance(&self, _n: u64) {}
    /// The current stage is finished.
    fn finish(&self) {}
    /// Something the user should know (a warning or a note on what was done).
    fn note(&self, _message: &str) {}
}

/// An observer that ignores everything.
#[derive(Debug, Clone, Copy, Default)]
pub struct Silent;

impl Observer for Silent {}

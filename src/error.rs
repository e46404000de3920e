//! The library's error type.
//!
//! Every failure is one [`Error`]: an opaque value carrying an [`ErrorKind`] a caller can
//! match on and a one-line message that names the file, row, field and what was expected.
//! The binary maps [`ErrorKind::Input`] and [`ErrorKind::File`] to exit code 2,
//! [`ErrorKind::Gate`] (a failed quality gate) to 3, [`ErrorKind::Budget`] (no model meets
//! a budget) to 4, [`ErrorKind::KeepExact`] (the exact model is the better choice) to 5 and
//! the other kinds to 1 ([`Error::exit_code`]).

use std::fmt;

/// What kind of failure an [`Error`] is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// The caller's input (data, a flag, a kernel expression, an argument) is wrong.
    /// Exit code 2.
    Input,
    /// A model file (or another structured file) is malformed, truncated or inconsistent.
    /// Exit code 2.
    File,
    /// A numerical procedure failed (a solver did not converge, a system stayed singular).
    /// Exit code 1.
    Numerical,
    /// The operating system refused an operation (disk full, a write failed). Exit code 1.
    Io,
    /// A bug or an unexpected state inside kernelpress. Exit code 1.
    Internal,
    /// A quality gate the caller asked for (a minimum agreement or accuracy) was not met.
    /// Exit code 3, so that a pipeline can stop a rollout.
    Gate,
    /// No candidate meets the budget the caller set (latency, size, fidelity). Exit code 4.
    Budget,
    /// The exact model meets the budget and is at least as fast as any compiled model that
    /// does, so nothing was compiled for the caller. Exit code 5.
    KeepExact,
}

/// A kernelpress error: a kind and a one-line message.
///
/// ```
/// use kernelpress::{Error, ErrorKind};
/// let e = Error::input("data.csv: row 3, column 'rms': expected a number, found 'abc'");
/// assert_eq!(e.kind(), ErrorKind::Input);
/// assert_eq!(e.exit_code(), 2);
/// assert!(e.to_string().contains("row 3"));
/// match e.kind() {
///     ErrorKind::Input | ErrorKind::File => {}
///     _ => unreachable!(),
/// }
/// ```
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{message}")]
pub struct Error {
    kind: ErrorKind,
    message: String,
}

impl Error {
    /// A bad-input error (exit code 2).
    #[cold]
    pub fn input(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Input, message)
    }

    /// A malformed-file error (exit code 2).
    #[cold]
    pub fn file(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::File, message)
    }

    /// A numerical failure (exit code 1).
    #[cold]
    pub fn numerical(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Numerical, message)
    }

    /// An operating-system failure (exit code 1).
    #[cold]
    pub fn io(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Io, message)
    }

    /// An internal error (exit code 1).
    #[cold]
    pub fn internal(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Internal, message)
    }

    /// An error of `kind`.
    #[cold]
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Error {
            kind,
            message: message.into(),
        }
    }

    /// The kind of failure.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The message without the kind.
    pub fn message(&self) -> &str {
        &self.message
    }

    /// The same error with `context: ` put in front of its message.
    pub fn context(self, context: impl fmt::Display) -> Self {
        Error {
            kind: self.kind,
            message: format!("{context}: {}", self.message),
        }
    }

    /// True when the caller can fix it (bad input or a bad file).
    pub fn is_user_error(&self) -> bool {
        matches!(self.kind, ErrorKind::Input | ErrorKind::File)
    }

    /// The process exit code for this error: 2 for input and file errors, 3 for a failed
    /// quality gate, 4 when no model meets a budget, 5 when the exact model is the better
    /// choice, 1 otherwise.
    pub fn exit_code(&self) -> i32 {
        match self.kind {
            ErrorKind::Input | ErrorKind::File => 2,
            ErrorKind::Gate => 3,
            ErrorKind::Budget => 4,
            ErrorKind::KeepExact => 5,
            _ => 1,
        }
    }
}

/// Result with [`Error`].
pub type Result<T> = std::result::Result<T, Error>;

/// An I/O error on `path`: an input error when the file is missing or unreadable because of
/// the user's path, a file error when its content is bad, otherwise an I/O error.
pub(crate) fn io_error(path: &std::path::Path, what: &str, e: std::io::Error) -> Error {
    use std::io::ErrorKind as K;
    let msg = format!("{}: cannot {what}: {e}", path.display());
    match e.kind() {
        K::NotFound | K::PermissionDenied | K::IsADirectory => Error::input(msg),
        K::InvalidData | K::UnexpectedEof => Error::file(msg),
        _ => Error::io(msg),
    }
}

/// Levenshtein distance (for suggestions).
fn distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1];
        for (j, cb) in b.iter().enumerate() {
            let sub = prev[j] + usize::from(ca != *cb);
            cur.push(sub.min(prev[j + 1] + 1).min(cur[j] + 1));
        }
        prev = cur;
    }
    prev[b.len()]
}

/// The candidate within two edits of `name` (or a third of its length, for long names),
/// if any: the nearest, first on ties. Used by every "did you mean" in error messages.
pub(crate) fn closest<'a>(name: &str, candidates: &[&'a str]) -> Option<&'a str> {
    let limit = 2.max(name.chars().count() / 3);
    candidates
        .iter()
        .map(|c| (distance(name, c), *c))
        .filter(|(d, _)| *d <= limit)
        .min_by_key(|(d, _)| *d)
        .map(|(_, c)| c)
}

/// `" — did you mean 'X'?"` for the closest candidate, or nothing.
pub(crate) fn did_you_mean(name: &str, candidates: &[&str]) -> String {
    closest(name, candidates)
        .map(|c| format!(" — did you mean '{c}'?"))
        .unwrap_or_default()
}

#[cfg(test)]
mod suggestion_tests {
    use super::*;

    #[test]
    fn nearest_name_within_reach() {
        assert_eq!(closest("tayler", &["fourier", "taylor"]), Some("taylor"));
        assert_eq!(
            closest("conditon", &["vib_rms", "condition"]),
            Some("condition")
        );
        assert_eq!(closest("zzz", &["fourier", "taylor"]), None);
        assert_eq!(
            did_you_mean("hadamrd", &["hadamard"]),
            " — did you mean 'hadamard'?"
        );
        assert_eq!(did_you_mean("x", &["hadamard"]), "");
    }
}

//! The library's error type.
//!
//! Every failure is one [`Error`]: an opaque value carrying an [`ErrorKind`] (bad input
//! from the user, or an internal failure) and a one-line message that names the file,
//! row, field and what was expected. The binary maps [`ErrorKind::Input`] to exit code 2
//! and [`ErrorKind::Internal`] to exit code 1.

use std::fmt;

/// What kind of failure an [`Error`] is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// The user's input (a file, a flag, a kernel expression) is wrong. Exit code 2.
    Input,
    /// Something failed inside kernelpress or the operating system. Exit code 1.
    Internal,
}

/// A kernelpress error: a kind and a one-line message.
///
/// ```
/// use kernelpress::{Error, ErrorKind};
/// let e = Error::input("data.csv: row 3, column 'rms': expected a number, found 'abc'");
/// assert_eq!(e.kind(), ErrorKind::Input);
/// assert!(e.to_string().contains("row 3"));
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
        Error {
            kind: ErrorKind::Input,
            message: message.into(),
        }
    }

    /// An internal error (exit code 1).
    #[cold]
    pub fn internal(message: impl Into<String>) -> Self {
        Error {
            kind: ErrorKind::Internal,
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

    /// The process exit code for this error: 2 for input, 1 for internal.
    pub fn exit_code(&self) -> i32 {
        match self.kind {
            ErrorKind::Input => 2,
            ErrorKind::Internal => 1,
        }
    }
}

/// Result with [`Error`].
pub type Result<T> = std::result::Result<T, Error>;

/// An I/O error on `path`, as an input error when the file is missing or unreadable
/// because of the user's path, otherwise internal.
pub(crate) fn io_error(path: &std::path::Path, what: &str, e: std::io::Error) -> Error {
    use std::io::ErrorKind as K;
    let msg = format!("{}: cannot {what}: {e}", path.display());
    match e.kind() {
        K::NotFound | K::PermissionDenied | K::InvalidData | K::UnexpectedEof | K::IsADirectory => {
            Error::input(msg)
        }
        _ => Error::internal(msg),
    }
}

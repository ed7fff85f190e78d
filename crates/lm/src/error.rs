//! The one error type of this crate.

use std::path::PathBuf;

/// Everything that can go wrong while reading, building, estimating or writing a language model.
///
/// Messages name the file (or the item) and the line where that makes sense, what was expected
/// and what was found.
#[derive(Debug, thiserror::Error)]
pub enum LmError {
    /// A file could not be opened, read or written.
    #[error("{path}: {action}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What we were doing ("cannot open", "cannot read", "cannot write").
        action: &'static str,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// A malformed line in an ARPA file.
    #[error("{path}, line {line}: {message}")]
    Arpa {
        /// The ARPA file.
        path: PathBuf,
        /// 1-based line number (the last line read when the problem is the end of the file).
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// A problem in a training, tuning or vocabulary text.
    #[error("{path}, line {line}: {message}")]
    Text {
        /// The text file.
        path: PathBuf,
        /// 1-based line number (0 when the problem concerns the whole file).
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// An n-gram order outside the supported range.
    #[error("n-gram order {found} is not supported: expected 1 to {max}")]
    UnsupportedOrder {
        /// The order that was asked for.
        found: usize,
        /// The largest supported order.
        max: usize,
    },
    /// A setting or combination of inputs that cannot be used.
    #[error("{0}")]
    Invalid(String),
}

impl LmError {
    pub(crate) fn io(
        path: impl Into<PathBuf>,
        action: &'static str,
        source: std::io::Error,
    ) -> Self {
        LmError::Io {
            path: path.into(),
            action,
            source,
        }
    }
}

//! Corpus manifests: reading, validating and splitting the tab-separated utterance lists, and the
//! tab-separated table reader that every isogloss text format shares.
#![deny(missing_docs)]

use std::path::PathBuf;

pub mod tsv;

/// Everything that can go wrong reading or checking a corpus file.
#[derive(Debug, thiserror::Error)]
pub enum CorpusError {
    /// The file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// The file's content does not follow its format.
    #[error("{path}, line {line}: {message}")]
    Format {
        /// The file.
        path: PathBuf,
        /// 1-based line number.
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
}

//! The one error type of this crate.

use std::path::PathBuf;

/// An error from one of the caller's sides (the acoustic model, the audio reader).
pub type SideError = Box<dyn std::error::Error + Send + Sync>;

/// Everything that can go wrong in a batch. Messages name the file, the line or the item, what
/// was expected and what was found; each piece of context is said once.
#[derive(Debug, thiserror::Error)]
pub enum BatchError {
    /// A file could not be opened, read or written.
    #[error("{path}: cannot {action}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What was being done ("open", "read", "write", "create").
        action: &'static str,
        /// The operating system's error.
        source: std::io::Error,
    },
    /// A line of an input file (manifest, journal) is not what it must be.
    #[error("{path}, line {line}: {message}")]
    Line {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// A setting is out of range; the message names it as the user wrote it.
    #[error("{0}")]
    Setting(String),
    /// The lexicon does not fit the model's units.
    #[error("{path}: lexicon does not fit the model: {source}")]
    Lexicon {
        /// The lexicon file.
        path: PathBuf,
        /// What the decoder found wrong.
        source: isogloss_decoder::DecodeError,
    },
    /// The manifest table could not be read.
    #[error(transparent)]
    Table(#[from] isogloss_corpus::CorpusError),
    /// The lexicon file could not be read.
    #[error(transparent)]
    LexiconFile(#[from] isogloss_lexicon::LexiconError),
    /// The language model could not be read.
    #[error(transparent)]
    LanguageModel(#[from] isogloss_lm::LmError),
    /// Decoding failed.
    #[error(transparent)]
    Decode(#[from] isogloss_decoder::DecodeError),
    /// The acoustic model or the audio reader failed.
    #[error(transparent)]
    Side(SideError),
}

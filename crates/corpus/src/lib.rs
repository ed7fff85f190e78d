//! Corpus manifests for isogloss: reading, validating and splitting the tab-separated utterance
//! lists, and the tab-separated table reader that every isogloss text format shares.
//!
//! # Design
//!
//! A manifest (`id audio start end speaker dialect` + transcript columns, `docs/formats.md`) is the one
//! description of a corpus every later stage reads. Two ways in serve two needs:
//! [`Manifest::read`] stops at the first structural error (what a trainer wants), while
//! [`Manifest::read_collecting`] and [`check::check_manifests`] carry on past every bad row
//! and return all [`Problem`]s at once, each naming file and line (what a person fixing a
//! spreadsheet wants). Audio paths are resolved against the manifest's folder on reading and
//! made relative again on writing, so manifests and their audio can move together.
//!
//! Splits ([`split::split_by_speaker`]) deal out whole speakers, stratified by dialect and
//! measured in audio duration, with a seeded ChaCha8 shuffle, so they are reproducible and never
//! leak a voice from training into evaluation.
//!
//! # Example
//!
//! ```no_run
//! use isogloss_corpus::Manifest;
//!
//! # fn main() -> Result<(), isogloss_corpus::CorpusError> {
//! let manifest = Manifest::read("corpus/train.tsv".as_ref())?;
//! let column = manifest.column_index("normalized")?;
//! for utterance in &manifest.utterances {
//!     println!("{} {}", utterance.id, utterance.transcripts[column]);
//! }
//! # Ok(())
//! # }
//! ```
#![deny(missing_docs)]

use std::path::{Path, PathBuf};

pub mod check;
mod manifest;
pub mod split;
pub mod tsv;

pub use manifest::{Manifest, Problem, Severity, Utterance, REQUIRED_COLUMNS};

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
    /// The audio a manifest row points to cannot be used.
    #[error("{path}, line {line}: {source}")]
    Audio {
        /// The manifest.
        path: PathBuf,
        /// 1-based line of the row.
        line: usize,
        /// What the audio reader found.
        source: isogloss_audio::AudioError,
    },
    /// A setting outside its valid range.
    #[error("invalid {what}: expected {expected}, found {found}")]
    InvalidParameter {
        /// Which setting.
        what: &'static str,
        /// The valid range.
        expected: &'static str,
        /// The value given.
        found: String,
    },
}

impl CorpusError {
    /// The file the error is about (empty for parameter errors).
    pub fn path(&self) -> &Path {
        match self {
            CorpusError::Io { path, .. }
            | CorpusError::Format { path, .. }
            | CorpusError::Audio { path, .. } => path,
            CorpusError::InvalidParameter { .. } => Path::new(""),
        }
    }
}

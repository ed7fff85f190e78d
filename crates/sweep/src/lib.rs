//! Ablation sweeps: a grid of language-model, lexicon, writing and decoder choices, decoded over
//! acoustic posteriors that are computed once and cached.
//!
//! Key design decision: the acoustic model is by far the most expensive step, and it does not
//! depend on any axis of the grid but the model. So the sweep computes posteriors once per model
//! and test utterance, caches them on disk keyed by the content hashes of the model and the audio,
//! and every cell only decodes and scores. Finished cells are cached too, keyed by everything
//! they depend on, so an interrupted sweep continues where it stopped.
#![deny(missing_docs)]

use std::path::PathBuf;

pub mod config;
pub mod posteriors;
pub mod report;
pub mod resources;
pub mod run;

pub use config::{Cell, LexiconChoice, LexiconKind, LmChoice, Sweep};
pub use run::{CellResult, FailedCell, SweepEvent, SweepResults};

/// Everything that can go wrong in a sweep.
#[derive(Debug, thiserror::Error)]
pub enum SweepError {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// The sweep file is malformed or names something that does not exist.
    #[error("{path}, line {line}: {message}")]
    Config {
        /// The sweep file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// Building a language model or lexicon failed (the message names the file).
    #[error("{0}")]
    Build(String),
}

//! Acoustic model: a TDNN over feature frames trained with the CTC criterion on CPU.
#![deny(missing_docs)]

pub mod config;
pub mod ctc;
pub mod greedy;
pub mod io;
pub mod optim;
pub mod tdnn;
pub mod train;
pub mod units;

use std::path::PathBuf;

pub use greedy::{greedy_decode, greedy_path};

/// Everything that can go wrong in the acoustic stage.
#[derive(Debug, thiserror::Error)]
pub enum AcousticError {
    /// Tensors or batches whose shapes do not agree.
    #[error("shape mismatch: {0}")]
    Shape(String),
    /// An invalid architecture or training configuration.
    #[error("invalid configuration: {0}")]
    Config(String),
    /// A file that could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// A transcript unit the model's inventory (or the lexicon) cannot map.
    #[error("{item}: the unit {unit:?} is not in the model's unit inventory")]
    UnknownUnit {
        /// The utterance or word, with its file and line where known.
        item: String,
        /// The unit that could not be mapped.
        unit: String,
    },
    /// A model directory that cannot be used.
    #[error("{path}: {problem}")]
    Model {
        /// The file at fault.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
    /// A training checkpoint that cannot be resumed from.
    #[error("checkpoint {path}: {problem}")]
    Checkpoint {
        /// The checkpoint file.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
    /// An error from the tensor library.
    #[error("tensor operation failed: {0}")]
    Tensor(#[from] candle_core::Error),
}

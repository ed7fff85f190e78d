//! Word certainties for isogloss after decoding: how far they can be trusted, and what they are
//! good for — choosing which untranscribed segments a person should transcribe next, and which
//! machine transcripts are safe to train on.
//!
//! The decoder gives every word a *certainty* in (0, 1]: the geometric mean of its units' peak
//! posteriors (`isogloss_decoder::DecodedWord::confidence`). That number ranks words well but is
//! not a probability of being right. This crate turns it into one and measures how well it does:
//!
//! - [`outcome`]: which hypothesis words are right, by aligning them with a reference transcript
//!   (the same aligner and token rules as scoring; a permissible spelling variant counts as
//!   right when a variant map is given).
//! - [`calibration`]: a temperature and shift fitted on dev, `p = σ(logit(c) / T + shift)`, the
//!   reliability table and expected calibration error (ECE), and the reliability chart as SVG.
//! - [`ranking`]: untranscribed segments ranked for human transcription within a budget in
//!   minutes, by expected word errors, unknown words and the dialects and speakers the training
//!   manifest has least of.
//! - [`selftrain`]: the confidence threshold of a self-training round, chosen on dev (the lowest
//!   one whose kept dev segments meet a WER target, or a fixed one), and the untranscribed
//!   segments it keeps as pseudo-labels.
//!
//! # Key design decision
//!
//! One number per word flows through everything: the *calibrated* word confidence
//! ([`Calibration::apply`]). Segment confidence ([`segment_confidence`]) is the mean of the
//! calibrated word confidences, so it reads as "expected share of words right", and a threshold
//! on it means the same thing on any corpus whose dev split the calibration was fitted on. The
//! ranking and a self-training loop share that plumbing: ranking takes the lowest segments for
//! people, self-training keeps the highest ones as pseudo-labels. The calibration is
//! monotone (two parameters on the log-odds), so it cannot reorder words: a ranking by word
//! confidence is the same with or without it, and a small dev split is enough to fit it.
//!
//! # Example
//!
//! ```
//! use isogloss_confidence::{expected_calibration_error, Calibration, WordOutcome};
//!
//! // over-confident certainties: 0.9 but right only 60 % of the time
//! let words: Vec<WordOutcome> = (0..100)
//!     .map(|i| WordOutcome { certainty: 0.9, correct: i % 5 < 3 })
//!     .collect();
//! let fitted = Calibration::fit_temperature(&words).unwrap();
//! assert!(fitted.temperature() > 1.0);
//! let before = expected_calibration_error(&words, &Calibration::IDENTITY, 10);
//! let after = expected_calibration_error(&words, &fitted, 10);
//! assert!(after < 0.01 && before > 0.29);
//! ```
#![deny(missing_docs)]

use std::path::PathBuf;

pub mod calibration;
pub mod outcome;
pub mod ranking;
pub mod selftrain;

pub use calibration::{
    expected_calibration_error, reliability, reliability_svg, segment_confidence, Calibration,
    CalibrationRecord, Reliability, ReliabilityBin,
};
pub use outcome::{word_outcomes, WordOutcome};
pub use ranking::{
    rank_correlation, shortlist, Candidate, RankWeights, Ranked, Shortlist, TrainingProfile,
};
pub use selftrain::{
    choose_threshold, pool_against_dev, pooled_wer, select, DevSegment, PoolAgainstDev,
    PseudoCandidate, Selection, ThresholdChoice, ThresholdRule,
};

/// Everything that can go wrong calibrating or ranking; messages name the file or item.
#[derive(Debug, thiserror::Error)]
pub enum ConfidenceError {
    /// No calibration can be fitted from these words.
    #[error("cannot fit a calibration: {0}")]
    CannotFit(String),
    /// A calibration file cannot be read or written, or holds a bad value.
    #[error("{path}: {problem}")]
    CalibrationFile {
        /// The file.
        path: PathBuf,
        /// What was expected and found.
        problem: String,
    },
    /// A table could not be read (file, line and problem named by the corpus reader).
    #[error(transparent)]
    Corpus(#[from] isogloss_corpus::CorpusError),
    /// A candidate segment is not usable.
    #[error("segment `{id}`: {problem}")]
    BadSegment {
        /// The segment id.
        id: String,
        /// What was expected and found.
        problem: String,
    },
}

//! The one error type of this crate.

use std::path::PathBuf;

/// Everything that can go wrong in the speaker stage. Each message names the item (utterance,
/// speaker, file or config key) once, what was expected and what was found.
#[derive(Debug, thiserror::Error)]
pub enum SpeakerError {
    /// A configuration value out of its valid range or inconsistent with another one.
    #[error("i-vector config: `{key}` must be {expected}, found {found}")]
    InvalidConfig {
        /// The TOML key of the setting (`ubm.gaussians`, `window_seconds`, …).
        key: &'static str,
        /// What a valid value looks like.
        expected: String,
        /// The value given.
        found: String,
    },
    /// A TOML config file that cannot be parsed.
    #[error("{path}, line {line}: {message}")]
    ConfigSyntax {
        /// The config file.
        path: PathBuf,
        /// 1-based line of the problem.
        line: usize,
        /// The parser's message.
        message: String,
    },
    /// A TOML config file that holds an invalid setting.
    #[error("{path}: {message}")]
    ConfigFile {
        /// The config file.
        path: PathBuf,
        /// The invalid setting, what was expected and found.
        message: String,
    },
    /// An utterance (or a stream) with no feature frames at all.
    #[error("{item}: no feature frames")]
    NoFrames {
        /// The utterance or stream.
        item: String,
    },
    /// An utterance with fewer frames than the extractor's `min_frames`.
    #[error("{item}: {found} feature frames, at least {min} needed (setting `min_frames`)")]
    TooFewFrames {
        /// The utterance.
        item: String,
        /// Frames it has.
        found: usize,
        /// Frames needed.
        min: usize,
    },
    /// A speaker none of whose utterances has usable frames.
    #[error("speaker {speaker}: no usable feature frames ({utterances} utterances, none usable)")]
    SpeakerWithoutFrames {
        /// The speaker.
        speaker: String,
        /// How many utterances the speaker had.
        utterances: usize,
    },
    /// A feature value that is NaN or infinite.
    #[error(
        "{item}: feature value {value} at frame {frame}, dimension {dim} is not a finite number"
    )]
    NonFinite {
        /// The utterance or stream.
        item: String,
        /// Frame index (0-based, within the item).
        frame: usize,
        /// Dimension index (0-based).
        dim: usize,
        /// The offending value.
        value: f32,
    },
    /// Features whose dimension differs from the one the extractor works on.
    #[error("{item}: {found}-dimensional features, but the i-vector extractor takes {expected}")]
    DimensionMismatch {
        /// The utterance, stream or model.
        item: String,
        /// Dimensions the extractor takes.
        expected: usize,
        /// Dimensions found.
        found: usize,
    },
    /// Model parameters that do not form a valid model (shapes, non-positive variances, …).
    #[error("invalid model parameters: {problem}")]
    InvalidModel {
        /// What is wrong.
        problem: String,
    },
    /// Features whose frame shift differs from the one the extractor was trained on (the online
    /// window would cover a different stretch of time).
    #[error("{item}: features every {found} s, but the i-vector extractor was trained on features every {expected} s")]
    FrameShiftMismatch {
        /// The model or stream.
        item: String,
        /// Frame shift of the extractor, in seconds.
        expected: f64,
        /// Frame shift found, in seconds.
        found: f64,
    },
    /// Training cannot proceed with the data it was given.
    #[error("i-vector training: {problem}")]
    Training {
        /// What is wrong (too few usable utterances, speakers for LDA, …).
        problem: String,
    },
    /// Reading or writing a file failed.
    #[error("{path}: {action} failed: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What we were doing ("reading", "writing").
        action: &'static str,
        /// The operating system's error.
        source: std::io::Error,
    },
    /// A saved extractor that cannot be used (bad description, missing or misshapen tensor).
    #[error("{path}: {problem}")]
    Extractor {
        /// The file at fault.
        path: PathBuf,
        /// What is wrong with it.
        problem: String,
    },
}

//! The one error type of this crate.

use std::path::PathBuf;

/// Everything that can go wrong in the feature front end. Messages name the file or setting,
/// what was expected and what was found.
#[derive(Debug, thiserror::Error)]
pub enum FeatureError {
    /// A configuration value is out of its valid range or inconsistent with another value.
    #[error("feature config: `{setting}` must be {expected}, found {found}")]
    InvalidConfig {
        /// The TOML key of the offending setting.
        setting: &'static str,
        /// What a valid value looks like.
        expected: String,
        /// The value that was given.
        found: String,
    },
    /// An augmentation setting out of range, named by its key in the training configuration.
    #[error("{key}: expected {expected}, found {found}")]
    InvalidSetting {
        /// The key, e.g. `augmentation.vtlp.warp_factor`.
        key: &'static str,
        /// What a valid value looks like.
        expected: String,
        /// The value that was given.
        found: String,
    },
    /// A TOML config file could not be parsed.
    #[error("{path}, line {line}: {message}")]
    ConfigSyntax {
        /// The config file.
        path: PathBuf,
        /// 1-based line of the problem.
        line: usize,
        /// The parser's message.
        message: String,
    },
    /// A TOML config file holds an invalid setting (the setting is named).
    #[error("{path}: {message}")]
    ConfigFile {
        /// The config file.
        path: PathBuf,
        /// The invalid setting, what was expected and found.
        message: String,
    },
    /// Reading or writing a file failed.
    #[error("{path}: {action} failed: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What we were doing ("reading", "writing").
        action: &'static str,
        /// The underlying error.
        source: std::io::Error,
    },
    /// A feature file is not a well-formed safetensors file.
    #[error("{path}: not a valid safetensors feature file: {message}")]
    Safetensors {
        /// The file.
        path: PathBuf,
        /// What was wrong.
        message: String,
    },
    /// A feature file lacks the `features` tensor or has it in the wrong type or shape.
    #[error("{path}: expected {expected}, found {found}")]
    UnexpectedTensor {
        /// The file.
        path: PathBuf,
        /// What a feature file must hold.
        expected: String,
        /// What this one holds.
        found: String,
    },
    /// A feature matrix does not have the number of dimensions the statistics were made for.
    #[error("{item}: expected {expected} feature dimensions, found {found}")]
    DimensionMismatch {
        /// The utterance, speaker or matrix concerned.
        item: String,
        /// The number of dimensions expected.
        expected: usize,
        /// The number found.
        found: usize,
    },
    /// Normalisation statistics were requested for a speaker or utterance with no frames.
    #[error("{item}: no frames to compute normalisation statistics from")]
    NoFrames {
        /// The utterance or speaker concerned.
        item: String,
    },
}

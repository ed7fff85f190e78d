//! Pronunciation lexicons for isogloss: the tab-separated lexicon file, grapheme lexicons derived
//! from spelling, rule-based grapheme-to-phoneme conversion for dialectal writing, a trained
//! joint-sequence (graphone) grapheme-to-phoneme model for normalized writing, and coverage of a
//! corpus by a lexicon.
//!
//! The decoder searches words through a lexicon, and which lexicon is one of the users' ablation
//! axes, so every way of making one ends in the same value type, [`Lexicon`], and the same file.
//!
//! Key design decisions:
//! - **Two grapheme-to-phoneme routes, one output.** Dialectal writing follows the sound loosely,
//!   so an ordered, human-readable rule file ([`rules::RuleSet`]) maps letter sequences to
//!   phonemes; normalized writing does not, so pronunciations come from a dictionary and a model
//!   trained on it ([`graphone::G2pModel`]) fills the gaps. Both report words they cannot
//!   handle instead of dropping them.
//! - **The graphone n-gram is the LM crate's**: the same modified Kneser-Ney estimation and
//!   back-off model the decoder's word LM uses, behind a small trait
//!   ([`graphone::GraphoneLm`]) that the beam search is written against.
//! - **Letters are Unicode scalar values after NFC composition** (see
//!   [`Lexicon::graphemes`]): a precomposed `ä` and `a` + combining diaeresis are one letter.
//!   Grapheme lexicons keep apostrophes and hyphens as units, because a grapheme acoustic model
//!   trained on the same transcripts emits them.
//!
//! ```
//! use isogloss_lexicon::Lexicon;
//! let lexicon = Lexicon::graphemes(["hoose", "goin'"], Some("<wb>"));
//! assert_eq!(lexicon.pronunciations("hoose"), [["h", "o", "o", "s", "e", "<wb>"]]);
//! assert!(lexicon.units().contains("'"));
//! ```
#![deny(missing_docs)]

use std::path::PathBuf;

pub mod coverage;
pub mod graphone;
mod lexicon;
pub mod rules;
pub mod trie;

pub use coverage::Coverage;
pub use lexicon::{letters, read_word_list, Lexicon};

/// Everything that can go wrong reading lexicons, rule files, word lists and G2P models.
#[derive(Debug, thiserror::Error)]
pub enum LexiconError {
    /// A tab-separated file could not be read (the message names the file and line).
    #[error(transparent)]
    Table(#[from] isogloss_corpus::CorpusError),
    /// The n-gram part of a G2P model file is not valid ARPA text (the message names the file
    /// and line).
    #[error(transparent)]
    Ngram(#[from] isogloss_lm::LmError),
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// A file's content does not follow its format.
    #[error("{path}, line {line}: {message}")]
    Format {
        /// The file.
        path: PathBuf,
        /// 1-based line number.
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// A dictionary with no usable entries was given for training.
    #[error("{path}: expected at least one `word<TAB>units` entry to train on, found none")]
    EmptyDictionary {
        /// The dictionary file.
        path: PathBuf,
    },
    /// A word that has no letter at all cannot be spelled out or converted.
    #[error("word `{word}`: expected at least one letter, found none")]
    NoLetters {
        /// The word as given.
        word: String,
    },
    /// A parameter given to training or decoding is out of range.
    #[error("{0}")]
    Parameter(String),
}

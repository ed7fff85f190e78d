//! N-gram language models for the decoder: counting, smoothing, ARPA reading and writing,
//! fast state-based querying, perplexity, mixing and pruning.
//!
//! # Key design decision
//!
//! Estimation and querying are separate. [`NgramCounts`] and [`estimate`] compute an interpolated
//! model (modified Kneser-Ney by default, after Chen & Goodman 1998) and fold it into back-off
//! form, the form the ARPA file stores. The decoder only ever sees [`ArpaModel`]: a hash table
//! per order keyed by (prefix n-gram index, word), so that one query is a few probes, and a small
//! `Copy` state ([`LmState`]) per hypothesis instead of a word history. Whatever the smoothing, a
//! model read from disk and a freshly estimated one behave identically.
//!
//! # Example
//!
//! ```
//! use isogloss_lm::ArpaModel;
//!
//! let text = "\\data\\\nngram 1=3\nngram 2=2\n\n\\1-grams:\n-99\t<s>\t-0.3\n-0.3\thello\t-0.2\n\
//!             -0.3\t</s>\n\n\\2-grams:\n-0.1\t<s> hello\n-0.2\thello </s>\n\n\\end\\\n";
//! let model = ArpaModel::read_from(text.as_bytes(), "inline.arpa").unwrap();
//! let hello = model.word_index("hello").unwrap();
//! let (log10_hello, state) = model.score(&model.sentence_start(), hello);
//! assert!((log10_hello - -0.1).abs() < 1e-6);
//! assert!((model.sentence_end(&state) - -0.2).abs() < 1e-6);
//! ```
#![deny(missing_docs)]

mod arpa;
mod error;
mod model;

pub use error::LmError;
pub use model::{
    ArpaModel, LmState, WordIndex, MAX_ENTRIES_PER_ORDER, MAX_ORDER, SENTENCE_END, SENTENCE_START,
    UNKNOWN_WORD,
};

#[cfg(test)]
mod tests_arpa;

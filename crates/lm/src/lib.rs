//! N-gram language models for the decoder: counting, smoothing, ARPA reading and writing,
//! fast state-based querying, perplexity, mixing and pruning.
//!
//! # Key design decision
//!
//! Estimation and querying are separate. [`NgramCounts`] counts by sorting packed n-gram keys
//! (lower orders are derived from the distinct higher-order n-grams, which yields Kneser-Ney
//! continuation counts for free); [`estimate_with`] computes an interpolated model (modified
//! Kneser-Ney by default, after Chen & Goodman 1998; also Kneser-Ney, Witten-Bell, add-k) and
//! folds it into back-off form, the form the ARPA file stores. [`write_estimated_arpa`] streams
//! that form to disk without building anything else, which keeps a 10-million-token build small.
//!
//! The decoder only ever sees [`ArpaModel`]: one hash table per order keyed by (prefix n-gram
//! index, word), so that a query is a few probes, and a small `Copy` state ([`LmState`]) per
//! hypothesis instead of a word history. Whatever the smoothing, a model read from disk and a
//! freshly estimated one behave identically. [`merge`] (EM-weighted mixing) and [`prune`]
//! (Stolcke's relative-entropy pruning) work on that back-off form and recompute back-off weights.
//!
//! Conventions (`docs/language-models.md`): one `<s>` before and one `</s>` after every sentence;
//! `<s>` is context only; unigrams interpolate with the uniform distribution over the vocabulary
//! (training types + `</s>` + `<unk>`); perplexity counts every word and `</s>`, OOVs as `<unk>`.
//!
//! # Example
//!
//! ```
//! use isogloss_lm::{estimate, NgramCounts, Smoothing};
//!
//! let sentences = ["the cat sat", "the cat ran", "a dog sat"]
//!     .iter()
//!     .map(|line| line.split_whitespace().map(String::from).collect::<Vec<_>>());
//! let counts = NgramCounts::from_sentences(sentences, 3).unwrap();
//! let estimated = estimate(&counts, Smoothing::ModifiedKneserNey).unwrap();
//! let model = estimated.model; // tiny corpus: `estimated.warnings` explains the discount fallback
//!
//! let mut state = model.sentence_start();
//! let mut log10_sentence = 0.0;
//! for word in ["the", "cat", "sat"] {
//!     let (log10_prob, next) = model.score(&state, model.word_index(word).unwrap());
//!     log10_sentence += log10_prob;
//!     state = next;
//! }
//! log10_sentence += model.sentence_end(&state);
//! assert!(log10_sentence < 0.0 && log10_sentence > -3.0);
//! // model.write_arpa("model.arpa") writes it; ArpaModel::read reads it back.
//! ```
#![deny(missing_docs)]

mod arpa;
mod counts;
mod error;
mod estimate;
mod eval;
mod mix;
mod model;
mod prune;
mod rebuild;

pub use counts::{read_vocabulary, CountOptions, NgramCounts};
pub use error::LmError;
pub use estimate::{
    estimate, estimate_with, write_estimated_arpa, Discounts, Estimate, EstimateOptions,
    EstimateSummary, InterpolatedModel, Smoothing,
};
pub use eval::{
    evaluate_sentences, evaluate_text, read_sentences, score_sentence, Perplexity, SentenceScorer,
};
pub use mix::{estimate_weights, merge, Mixture, MixtureWeights};
pub use model::{
    ArpaModel, LmState, WordIndex, MAX_ENTRIES_PER_ORDER, MAX_ORDER, SENTENCE_END, SENTENCE_START,
    UNKNOWN_WORD,
};
pub use prune::prune;

#[cfg(test)]
mod tests_arpa;
#[cfg(test)]
mod tests_estimate;
#[cfg(test)]
mod tests_mix;

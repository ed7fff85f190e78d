//! Scoring: WER and flexible WER with alignments, per-group totals, confusions and bootstrap
//! confidence intervals.
//!
//! Users judge a recognizer for dialects by two figures: plain word error rate, and a flexible
//! word error rate in which a hypothesis word counts as correct when it is a permissible
//! spelling variant of the reference word (both share a normalized form in `variants.tsv`).
//!
//! The key design decision: flexible WER is *not* plain WER with some substitutions relabelled
//! afterwards. It is its own minimum-cost alignment in which a variant substitution costs 0, so
//! that the aligner may choose a different path when forgiving variants makes it cheaper. Both
//! rates come from one aligner ([`align_by`]) that only asks "equal, variant or different?",
//! which guarantees flexible WER ≤ WER and lets the same code be tested at character level
//! against textbook edit distances.
//!
//! Library functions return data ([`ScoreReport`] and friends are serde-serializable); the
//! command line and the sweep decide how to print it.
//!
//! ```
//! use isogloss_score::{align, tokenize, TokenRules, VariantMap};
//! let rules = TokenRules::default();
//! let reference = tokenize("We mended owd nets.", &rules);
//! let hypothesis = tokenize("we minded auld", &rules);
//! let mut variants = VariantMap::new();
//! variants.insert("owd", "old");
//! variants.insert("auld", "old");
//! let plain = align(&reference, &hypothesis, &VariantMap::new()).counts();
//! let flexible = align(&reference, &hypothesis, &variants).counts();
//! assert_eq!((plain.errors(), flexible.errors()), (3, 2));
//! assert_eq!(flexible.error_rate(), Some(0.5));
//! ```
#![deny(missing_docs)]

use std::path::PathBuf;

pub mod align;
pub mod bootstrap;
pub mod chart;
pub mod input;
pub mod report;
pub mod tokens;
pub mod variants;

pub use align::{align_by, AlignedPair, Alignment, Edit, ErrorCounts, Match};
pub use bootstrap::{BootstrapOptions, Interval, PairedBootstrap};
pub use input::{Hypotheses, Hypothesis, Reference, ReferenceUtterance};
pub use report::{
    report, score_system, summarize, Comparison, Confusion, GroupSummary, PairedDifference,
    ScoreOptions, ScoreReport, ScoredSystem, Summary, UtteranceScore,
};
pub use tokens::{normalize_word, tokenize, TokenRules};
pub use variants::{align, SkippedPair, TranscriptPair, VariantMap, VariantTable};

/// Everything that can go wrong reading or scoring.
#[derive(Debug, thiserror::Error)]
pub enum ScoreError {
    /// A table could not be read (file, line and problem named by the corpus reader).
    #[error(transparent)]
    Table(#[from] isogloss_corpus::CorpusError),
    /// A file's content does not follow its format.
    #[error("{path}, line {line}: {message}")]
    Format {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// What was expected and what was found.
        message: String,
    },
    /// An utterance id occurs twice.
    #[error("{path}, line {line}: expected each utterance id once, found `{id}` again (first on line {first_line})")]
    DuplicateId {
        /// The file.
        path: PathBuf,
        /// Line of the repeat.
        line: usize,
        /// The id.
        id: String,
        /// Line of the first occurrence.
        first_line: usize,
    },
    /// A hypothesis has an id the reference does not have.
    #[error("{path}, line {line}: expected an utterance id of the reference {reference}, found `{id}`{}", if *more > 0 { format!(" (and {more} more unknown ids)") } else { String::new() })]
    UnknownHypothesis {
        /// The hypotheses file.
        path: PathBuf,
        /// Line of the first unknown id.
        line: usize,
        /// The first unknown id.
        id: String,
        /// The reference file.
        reference: PathBuf,
        /// How many further unknown ids follow.
        more: usize,
    },
}

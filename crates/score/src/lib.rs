//! Scoring: WER and flexible WER with alignments, groups and bootstrap confidence intervals.
#![deny(missing_docs)]

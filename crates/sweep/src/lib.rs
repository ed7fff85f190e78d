//! Ablation sweeps: a grid of language-model, lexicon and decoder choices over cached acoustic posteriors.
#![deny(missing_docs)]

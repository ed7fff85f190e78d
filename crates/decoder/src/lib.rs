//! Decoding: CTC prefix beam search with a lexicon and an n-gram language model, and long-recording segmentation.
#![deny(missing_docs)]

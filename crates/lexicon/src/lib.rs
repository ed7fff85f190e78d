//! Pronunciation lexicons: TSV lexicons, rule-based and trained grapheme-to-phoneme conversion, the prefix trie.
#![deny(missing_docs)]

pub mod trie;

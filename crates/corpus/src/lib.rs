//! Corpus manifests: reading, validating and splitting the tab-separated utterance lists.
#![deny(missing_docs)]

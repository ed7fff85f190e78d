//! N-gram language models: counting, smoothing, ARPA reading and writing, querying, mixing and pruning.
#![deny(missing_docs)]

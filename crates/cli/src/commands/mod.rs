//! One module per command group; each exposes clap `Args` and a `run` returning an `Outcome`.

pub mod score;
pub mod variants;
pub mod lm;
pub mod lexicon;
pub mod decode;

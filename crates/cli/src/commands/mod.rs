//! One module per command group; each exposes clap `Args` and a `run` returning an `Outcome`.

pub mod corpus;
pub mod demo;
pub mod features;
pub mod lexicon;
pub mod lm;
pub mod score;
pub mod sweep;
pub mod train;
pub mod transcribe;
pub mod variants;

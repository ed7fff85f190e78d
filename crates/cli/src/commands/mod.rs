//! One module per command group; each exposes clap `Args` and a `run` returning an `Outcome`.

pub mod calibrate;
pub mod corpus;
pub mod demo;
pub mod features;
pub mod lexicon;
pub mod lm;
pub mod review;
pub mod score;
pub mod selftrain;
pub mod shortlist;
pub mod sweep;
pub mod train;
pub mod transcribe;
pub mod transcripts;
pub mod variants;

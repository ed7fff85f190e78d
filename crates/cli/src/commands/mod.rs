//! One module per command group; each exposes clap `Args` and a `run` returning an `Outcome`.

pub mod score;
pub mod variants;

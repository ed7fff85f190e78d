//! Mutation fuzzing of every isogloss parser, on the stable toolchain, run by `cargo test`.
//!
//! # Key design decision
//!
//! The fuzzer runs inside the ordinary test binary (`tests/fuzz.rs`), not as a separate
//! coverage-guided tool: CI needs only `cargo test`, and the same harness runs for hours when
//! `ISOGLOSS_FUZZ_SECONDS` asks for it. What coverage feedback would give, two cheaper signals
//! stand in for: mutations aimed at what parsers of this project get wrong (sizes, counts,
//! rates and offsets replaced by the extremes of every integer width, keywords of the format,
//! repeated and cut lines; see [`mutate`]), and a pool that keeps every input reaching a new
//! *kind* of outcome (an error message with its numbers and quotes removed), so that inputs
//! that get further into a parser are mutated further.
//!
//! Every call must return `Ok` or a typed error whose message names the file: a panic is a
//! failure, and so is a call whose peak heap use exceeds [`campaign::MEMORY_PER_INPUT_BYTE`]
//! times the input size plus [`campaign::MEMORY_FIXED_BYTES`], measured by the counting global
//! allocator of [`alloc`] that the test binary installs. An abort (say, an allocation of
//! hundreds of gigabytes) ends the process; the input that caused it is then the file left in
//! the scratch folder. Inputs that ever failed are kept in `regressions/TARGET/` and replayed
//! before any mutation.
//!
//! ```no_run
//! use std::time::Duration;
//! use isogloss_fuzz::{campaign, targets};
//!
//! let target = targets::target("arpa").unwrap();
//! let folders = campaign::Folders {
//!     seeds: "crates/fuzz/seeds/arpa".into(),
//!     regressions: "crates/fuzz/regressions/arpa".into(),
//!     scratch: "/tmp/fuzz-arpa".into(),
//!     found: "/tmp/fuzz-found".into(),
//! };
//! let report = campaign::run(&target, &folders, Duration::from_secs(10), 1);
//! println!("{report}");
//! ```
#![deny(missing_docs)]

pub mod alloc;
pub mod campaign;
pub mod mutate;
pub mod targets;

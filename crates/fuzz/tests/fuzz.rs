//! The fuzz campaigns, one test per parser. Each replays the regression files and seeds, then
//! mutates for `ISOGLOSS_FUZZ_SECONDS` seconds (default 2; set it to 600 for a ten-minute run
//! of each parser) with generator seed `ISOGLOSS_FUZZ_SEED` (default 1). The campaigns run one
//! at a time, because the peak-memory measurement is process-wide.

use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::Duration;

use isogloss_fuzz::alloc::{self, CountingAllocator};
use isogloss_fuzz::campaign::{self, Folders};
use isogloss_fuzz::targets;

#[global_allocator]
static ALLOCATOR: CountingAllocator = CountingAllocator;

/// Held by the running campaign: memory is measured for the whole process.
static ONE_AT_A_TIME: Mutex<()> = Mutex::new(());

/// A parser that allocates beyond this ends the run instead of the machine.
const HARD_LIMIT_BYTES: usize = 4 << 30;

fn env_number(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(text) => text
            .parse()
            .unwrap_or_else(|_| panic!("{name}: expected a whole number, found {text:?}")),
        Err(_) => default,
    }
}

fn fuzz(name: &str) {
    let _turn = ONE_AT_A_TIME.lock().unwrap_or_else(|p| p.into_inner());
    // Errors of the tensor library capture a backtrace when RUST_BACKTRACE is set, and printing
    // one loads the binary's debug information (about 80 MB, once per process, whatever the
    // input): that is the environment's cost, not the parser's, so library backtraces are
    // switched off before the first capture (panics still print theirs).
    std::env::set_var("RUST_LIB_BACKTRACE", "0");
    alloc::set_limit(HARD_LIMIT_BYTES);
    let target = targets::target(name).expect("a known target");
    let crate_dir = Path::new(env!("CARGO_MANIFEST_DIR"));
    let work = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("fuzz");
    let folders = Folders {
        seeds: crate_dir.join("seeds").join(name),
        regressions: crate_dir.join("regressions").join(name),
        scratch: work.join(name),
        found: work.join("found"),
    };
    std::fs::create_dir_all(&folders.scratch).expect("the scratch folder can be created");
    (target.prepare)(&folders.scratch, &crate_dir.join("seeds/companions"));
    let budget = Duration::from_secs(env_number("ISOGLOSS_FUZZ_SECONDS", 2));
    let seed = env_number("ISOGLOSS_FUZZ_SEED", 1);
    let report = campaign::run(&target, &folders, budget, seed);
    println!("{report}");
    let failures: Vec<String> = report
        .failures
        .iter()
        .map(|(path, failure)| format!("{}: {failure:?}", path.display()))
        .collect();
    // The bounds: no panic, no error without the file's name, peak heap at most
    // 64 × input size + a fixed bound (checked per call inside the campaign).
    assert!(
        failures.is_empty(),
        "{name}: {} failing inputs (copy them to crates/fuzz/regressions/{name}/ once fixed):\n{}",
        failures.len(),
        failures.join("\n")
    );
}

#[test]
fn every_target_has_a_test() {
    let source = include_str!("fuzz.rs");
    for name in targets::names() {
        let call = format!("fuzz(\"{name}\")");
        assert!(source.contains(&call), "no test calls {call}");
    }
}

#[test]
fn wav() {
    fuzz("wav")
}

#[test]
fn flac() {
    fuzz("flac")
}

#[test]
fn mp3() {
    fuzz("mp3")
}

#[test]
fn ogg() {
    fuzz("ogg")
}

#[test]
fn manifest() {
    fuzz("manifest")
}

#[test]
fn arpa() {
    fuzz("arpa")
}

#[test]
fn arpa_gzip() {
    fuzz("arpa-gzip")
}

#[test]
fn lexicon() {
    fuzz("lexicon")
}

#[test]
fn g2p() {
    fuzz("g2p")
}

#[test]
fn variants() {
    fuzz("variants")
}

#[test]
fn hypotheses() {
    fuzz("hypotheses")
}

#[test]
fn journal() {
    fuzz("journal")
}

#[test]
fn transcript() {
    fuzz("transcript")
}

#[test]
fn feature_config() {
    fuzz("feature-config")
}

#[test]
fn model_config() {
    fuzz("model-config")
}

#[test]
fn sweep_config() {
    fuzz("sweep-config")
}

#[test]
fn rules() {
    fuzz("rules")
}

#[test]
fn model_toml() {
    fuzz("model-toml")
}

#[test]
fn model_weights() {
    fuzz("model-weights")
}

#[test]
fn checkpoint() {
    fuzz("checkpoint")
}

#[test]
fn features_file() {
    fuzz("features-file")
}

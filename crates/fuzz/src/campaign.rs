//! One fuzz campaign: replay the regression files and seeds, then mutate until the time budget
//! is spent, and report every input that panicked, used too much memory or gave an error that
//! does not name the file.
//!
//! The input under test is written to a fixed file in the scratch folder before each call; if
//! the process dies (an abort, a stack overflow) that file is the input that killed it.
//!
//! Memory is measured with [`crate::alloc`]: the peak of live heap bytes during the call, minus
//! what was live before it. The bound is [`MEMORY_PER_INPUT_BYTE`] × input size +
//! [`MEMORY_FIXED_BYTES`].

use std::collections::HashSet;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use crate::alloc;
use crate::mutate::{mutate, Rng};
use crate::targets::Target;

/// Peak heap bytes a parser may use per byte of input.
pub const MEMORY_PER_INPUT_BYTE: usize = 64;

/// Peak heap bytes a parser may use whatever its input (buffers, decoder tables, FFT plans).
pub const MEMORY_FIXED_BYTES: usize = 64 << 20;

/// Largest input the mutator makes (bytes).
pub const MAX_INPUT_BYTES: usize = 256 << 10;

/// Inputs kept for mutation besides the seeds (those that reached a new kind of outcome).
const POOL_LIMIT: usize = 512;

/// The last panic message, recorded by the hook installed in [`run`].
static PANIC_MESSAGE: Mutex<Option<String>> = Mutex::new(None);

/// Why an input counts as a failure.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Failure {
    /// The parser panicked (message and location).
    Panic(String),
    /// The parser's peak heap use exceeded the bound.
    Memory {
        /// Measured peak heap bytes during the call.
        peak: usize,
        /// The bound for this input's size.
        bound: usize,
    },
    /// The error message does not name the input file.
    Unnamed(String),
}

/// What a campaign did.
#[derive(Debug, Default)]
pub struct Report {
    /// The target's name.
    pub target: String,
    /// Parser calls made.
    pub executions: u64,
    /// Calls that returned `Ok`.
    pub accepted: u64,
    /// Calls that returned a typed error.
    pub rejected: u64,
    /// Distinct kinds of outcome seen (error messages with their numbers and quotes removed).
    pub outcome_kinds: usize,
    /// Largest peak heap use of one call (bytes).
    pub largest_peak: usize,
    /// Largest ratio of peak heap use beyond [`MEMORY_FIXED_BYTES`] to the input size.
    pub largest_ratio_beyond_fixed: f64,
    /// Largest ratio of peak heap use to the input size, over inputs of at least 4 kB.
    pub largest_ratio_4k: f64,
    /// Wall-clock time spent.
    pub seconds: f64,
    /// Inputs that failed, with why; each is also written to the found folder.
    pub failures: Vec<(PathBuf, Failure)>,
}

impl std::fmt::Display for Report {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{}: {} executions in {:.0} s ({} accepted, {} rejected, {} kinds of outcome), \
             {} failures; largest peak {:.1} MB, largest peak/size over 4 kB inputs {:.1}, \
             beyond the fixed bound {:.2}",
            self.target,
            self.executions,
            self.seconds,
            self.accepted,
            self.rejected,
            self.outcome_kinds,
            self.failures.len(),
            self.largest_peak as f64 / 1e6,
            self.largest_ratio_4k,
            self.largest_ratio_beyond_fixed,
        )
    }
}

/// Where a campaign keeps its files.
#[derive(Debug, Clone)]
pub struct Folders {
    /// Seed inputs of this target.
    pub seeds: PathBuf,
    /// Inputs that failed once, replayed first.
    pub regressions: PathBuf,
    /// Scratch folder for the input under test (left behind if the process dies).
    pub scratch: PathBuf,
    /// Where newly failing inputs are written.
    pub found: PathBuf,
}

/// Reads every file of a folder (sorted by name); a missing folder gives none.
pub fn read_folder(folder: &Path) -> Vec<(String, Vec<u8>)> {
    let Ok(entries) = std::fs::read_dir(folder) else {
        return Vec::new();
    };
    let mut files: Vec<(String, Vec<u8>)> = entries
        .filter_map(Result::ok)
        .filter(|entry| entry.path().is_file())
        .filter_map(|entry| {
            let bytes = std::fs::read(entry.path()).ok()?;
            Some((entry.file_name().to_string_lossy().into_owned(), bytes))
        })
        .collect();
    files.sort();
    files
}

/// An error message reduced to its kind: digits and quoted parts removed, so that the same
/// check failing on different values counts once.
fn outcome_kind(message: &str) -> String {
    let mut kind = String::new();
    let mut quoted = None;
    for c in message.chars() {
        match (quoted, c) {
            (Some(q), c) if c == q => quoted = None,
            (Some(_), _) => {}
            (None, '`' | '\'' | '"') => quoted = Some(c),
            (None, c) if c.is_ascii_digit() => {}
            (None, c) => kind.push(c),
        }
        if kind.len() > 120 {
            break;
        }
    }
    kind
}

fn install_quiet_panic_hook() {
    std::panic::set_hook(Box::new(|info| {
        let payload = info.payload();
        let text = payload
            .downcast_ref::<&str>()
            .map(|s| s.to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "(non-text panic payload)".into());
        let location = info
            .location()
            .map(|l| format!(" at {}:{}", l.file(), l.line()))
            .unwrap_or_default();
        if let Ok(mut slot) = PANIC_MESSAGE.lock() {
            *slot = Some(format!("{text}{location}"));
        }
    }));
}

/// FNV-1a of the bytes, for the names of found inputs.
fn fingerprint(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325, |hash, &b| {
        (hash ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3)
    })
}

/// Runs one input; returns the failure, if any, and the outcome kind.
fn execute(target: &Target, scratch: &Path, input: &[u8]) -> (Option<Failure>, String, usize) {
    let file = scratch.join(target.file_name);
    if let Err(error) = std::fs::write(&file, input) {
        panic!("{}: cannot write the fuzz input: {error}", file.display());
    }
    alloc::reset_peak();
    let before = alloc::current();
    let result = catch_unwind(AssertUnwindSafe(|| (target.run)(&file)));
    let peak = alloc::peak().saturating_sub(before);
    let bound = MEMORY_PER_INPUT_BYTE * input.len() + MEMORY_FIXED_BYTES;
    match result {
        Err(_) => {
            let message = PANIC_MESSAGE
                .lock()
                .ok()
                .and_then(|mut slot| slot.take())
                .unwrap_or_default();
            (Some(Failure::Panic(message)), "panic".into(), peak)
        }
        Ok(outcome) => {
            if peak > bound {
                return (Some(Failure::Memory { peak, bound }), "memory".into(), peak);
            }
            match outcome {
                Ok(()) => (None, "ok".into(), peak),
                Err(message) => {
                    let kind = outcome_kind(&message);
                    if target.errors_name_the_file && !message.contains(target.file_name) {
                        (Some(Failure::Unnamed(message)), kind, peak)
                    } else {
                        (None, kind, peak)
                    }
                }
            }
        }
    }
}

/// Replays the regressions and seeds of `target`, then mutates for `budget`.
pub fn run(target: &Target, folders: &Folders, budget: Duration, seed: u64) -> Report {
    let previous_hook = std::panic::take_hook();
    install_quiet_panic_hook();
    std::fs::create_dir_all(&folders.scratch).expect("the scratch folder can be created");
    let started = Instant::now();
    let mut report = Report {
        target: target.name.to_string(),
        ..Report::default()
    };
    let mut kinds: HashSet<String> = HashSet::new();
    let seeds: Vec<Vec<u8>> = read_folder(&folders.seeds)
        .into_iter()
        .map(|(_, bytes)| bytes)
        .collect();
    assert!(
        !seeds.is_empty(),
        "{}: no seed files for target {}",
        folders.seeds.display(),
        target.name
    );
    let mut pool = seeds.clone();
    let fixed: Vec<Vec<u8>> = read_folder(&folders.regressions)
        .into_iter()
        .map(|(_, bytes)| bytes)
        .chain(seeds.iter().cloned())
        .collect();
    let mut rng = Rng::new(seed);
    let mut queue = fixed.into_iter();
    loop {
        let input = match queue.next() {
            Some(input) => input,
            None if started.elapsed() >= budget => break,
            None => {
                let mut input = pool[rng.below(pool.len())].clone();
                mutate(
                    &mut rng,
                    &mut input,
                    target.dictionary,
                    &pool,
                    MAX_INPUT_BYTES,
                );
                input
            }
        };
        let (failure, kind, peak) = execute(target, &folders.scratch, &input);
        report.executions += 1;
        report.largest_peak = report.largest_peak.max(peak);
        if !input.is_empty() {
            let beyond = peak.saturating_sub(MEMORY_FIXED_BYTES) as f64 / input.len() as f64;
            report.largest_ratio_beyond_fixed = report.largest_ratio_beyond_fixed.max(beyond);
            if input.len() >= 4096 {
                let ratio = peak as f64 / input.len() as f64;
                report.largest_ratio_4k = report.largest_ratio_4k.max(ratio);
            }
        }
        match kind.as_str() {
            "ok" => report.accepted += 1,
            "panic" | "memory" => {}
            _ => report.rejected += 1,
        }
        if let Some(failure) = failure {
            std::fs::create_dir_all(&folders.found).expect("the found folder can be created");
            let path = folders
                .found
                .join(format!("{}-{:016x}", target.name, fingerprint(&input)));
            std::fs::write(&path, &input).expect("a failing input can be saved");
            report.failures.push((path, failure));
            if report.failures.len() >= 20 {
                break;
            }
            continue;
        }
        if kinds.insert(kind) && pool.len() < POOL_LIMIT {
            pool.push(input);
        }
    }
    std::panic::set_hook(previous_hook);
    report.outcome_kinds = kinds.len();
    report.seconds = started.elapsed().as_secs_f64();
    report
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn outcome_kinds_ignore_numbers_and_quoted_text() {
        assert_eq!(
            outcome_kind("x.arpa, line 3: expected 'ngram N=COUNT', found 'ngram 1=7'"),
            outcome_kind("x.arpa, line 12: expected 'ngram N=COUNT', found 'zz'")
        );
        assert_ne!(
            outcome_kind("x.arpa, line 3: found the end of the file"),
            outcome_kind("x.arpa, line 3: expected UTF-8 text")
        );
    }
}

//! `isogloss train`: flags in, progress bars out; the work is `isogloss_acoustic::pipeline::train`.
//!
//! Started by an MPI launcher (`mpirun -np N`, a scheduler's launcher) from a build with the
//! `mpi` feature, the process is one of N data-parallel ranks
//! (`isogloss_acoustic::collective`): rank 0 draws the progress and prints the epochs, every
//! rank prints its own warnings and errors with its rank, and a rank whose run fails ends the
//! whole job.

use std::path::PathBuf;
use std::sync::Arc;

use anyhow::Context;
use clap::Args;
use indicatif::ProgressBar;
use isogloss_acoustic::collective::{Collective, SingleProcess};
use isogloss_acoustic::config::ModelConfig;
use isogloss_acoustic::pipeline::{self, PipelineEvent, TrainOptions};
use isogloss_acoustic::train::TrainingEvent;

use isogloss_confidence::ThresholdRule;
use isogloss_decoder::SearchOptions;

use super::selftrain::{self, SelfTraining};
use crate::Outcome;

/// The default `--round-rate-share`: rounds of self-training from a model trained to the end of
/// its schedule at 0.3 × the peak learning rate gained more on the demo than at the full rate,
/// which shakes the starting weights (README, "Self-training").
const DEFAULT_ROUND_RATE_SHARE: f64 = 0.3;

/// The most rounds of self-training one run may ask for.
const MAX_ROUNDS: usize = 100;

/// Train a TDNN acoustic model with CTC on a manifest's transcripts.
#[derive(Args)]
pub struct TrainArgs {
    /// Training manifest (TSV).
    #[arg(long)]
    manifest: PathBuf,
    /// Dev manifest (TSV) for early stopping and the per-epoch error rate.
    #[arg(long)]
    dev: PathBuf,
    /// Transcript column to learn (e.g. `dialectal` or `normalized`).
    #[arg(long)]
    column: String,
    /// Model directory to write (`model.toml`, `model.safetensors`, checkpoint, training log).
    #[arg(long)]
    out: PathBuf,
    /// Architecture and training settings (TOML); default: configs/tdnn-small.toml.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Number of epochs (overrides the configuration).
    #[arg(long, conflicts_with = "minutes")]
    epochs: Option<usize>,
    /// Train for this many minutes of wall time instead of a number of epochs; the learning-rate
    /// schedule is planned to end when they run out (decoding the audio first is not counted).
    #[arg(long, value_parser = parse_minutes)]
    minutes: Option<f64>,
    /// Continue an interrupted run from its last checkpoint.
    #[arg(long)]
    resume: bool,
    /// Seed for initialisation, data order, augmentation and dropout.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Train on phones: each word's units from this lexicon (`word<TAB>units`), instead of
    /// graphemes.
    #[arg(long)]
    lexicon: Option<PathBuf>,
    /// Start from the weights of this model directory (same network and front end) instead of
    /// a random initialisation; with --untranscribed, the model round 1 starts from.
    #[arg(long, value_name = "MODEL_DIR")]
    from: Option<PathBuf>,
    /// Self-training: a manifest of untranscribed segments (transcript columns are ignored).
    /// Each round transcribes it with the current model, keeps the segments whose confidence
    /// reaches a threshold chosen on dev, and trains on the transcribed plus these
    /// pseudo-labelled segments (docs/training.md, "Self-training").
    #[arg(long, value_name = "MANIFEST")]
    untranscribed: Option<PathBuf>,
    /// Rounds of self-training.
    #[arg(long, default_value_t = 1, requires = "untranscribed")]
    rounds: usize,
    /// The threshold rule: the lowest segment confidence at which the kept dev segments' WER is
    /// at most this share (0.1 = 10 %).
    #[arg(long, default_value_t = isogloss_confidence::selftrain::DEFAULT_TARGET_WER)]
    pseudo_max_wer: f64,
    /// A fixed segment-confidence threshold instead of the dev rule.
    #[arg(long, conflicts_with = "pseudo_max_wer")]
    pseudo_threshold: Option<f64>,
    /// ARPA language model for transcribing the untranscribed segments and dev.
    #[arg(long, requires = "untranscribed")]
    lm: Option<PathBuf>,
    /// Lexicon for transcribing (word<TAB>units); default: --lexicon when given.
    #[arg(long, requires = "untranscribed")]
    decode_lexicon: Option<PathBuf>,
    /// Weight of the LM in that decoding (as `transcribe --lm-weight`).
    #[arg(long, default_value_t = isogloss_decoder::DEFAULT_LM_WEIGHT)]
    lm_weight: f32,
    /// Score added per word in that decoding (as `transcribe --word-bonus`).
    #[arg(long, default_value_t = isogloss_decoder::DEFAULT_WORD_BONUS)]
    word_bonus: f32,
    /// The peak learning rate of each self-training round as a share of the configuration's
    /// `learning_rate` (a round starts from trained weights; 1 gives the full rate).
    #[arg(long, default_value_t = DEFAULT_ROUND_RATE_SHARE, requires = "untranscribed")]
    round_rate_share: f64,
    /// Worker threads of this process (of each rank under an MPI launcher); default: the
    /// RAYON_NUM_THREADS environment variable, else every core, shared among the ranks started
    /// on the same machine.
    #[arg(long, value_parser = clap::value_parser!(u16).range(1..))]
    threads: Option<u16>,
    /// Compute each batch's features before the step that needs them, on the training
    /// threads, instead of on one more thread while the previous batch trains (the weights
    /// are the same either way). Without `--prefetch` or `--no-prefetch`, the extra thread is
    /// used only when the training threads leave a core of this machine free.
    #[arg(long, conflicts_with = "prefetch")]
    no_prefetch: bool,
    /// Compute the next batch's features on one more thread even when the training threads
    /// already use every core.
    #[arg(long)]
    prefetch: bool,
    /// Under an MPI launcher: seconds a rank waits for the others at an exchange before it
    /// decides a rank has failed and ends the job (exit code 3).
    #[arg(long, default_value_t = 600.0, value_parser = parse_timeout)]
    rank_timeout: f64,
}

/// A rank timeout: a positive number of seconds up to a day.
fn parse_timeout(text: &str) -> Result<f64, String> {
    match text.parse::<f64>() {
        Ok(seconds) if seconds.is_finite() && seconds > 0.0 && seconds <= 86_400.0 => Ok(seconds),
        _ => Err(format!(
            "expected seconds above 0 and at most 86400 (a day), found {text:?}"
        )),
    }
}

/// Environment variables by which MPI launchers tell a process how many ranks the job has.
#[cfg(not(feature = "mpi"))]
const LAUNCHER_SIZE_VARIABLES: [&str; 2] = ["OMPI_COMM_WORLD_SIZE", "PMI_SIZE"];

/// Ranks of this job that run on this machine, as the launcher says (1 when not launched).
fn local_ranks() -> usize {
    ["OMPI_COMM_WORLD_LOCAL_SIZE", "MPI_LOCALNRANKS"]
        .iter()
        .find_map(|name| std::env::var(name).ok()?.parse::<usize>().ok())
        .unwrap_or(1)
        .max(1)
}

/// `--prefetch` or `--no-prefetch` as given; else prefetch only when a core is free for its
/// thread: measured on two quiet cores, it gained 10 % at one training thread and lost 7 % at
/// two (DEVELOPERS.md, "Feature prefetch: measured figures").
fn prefetch_wanted(on: bool, off: bool, spare_core: bool) -> bool {
    on || (!off && spare_core)
}

/// Whether the training threads of every rank on this machine leave a core free.
fn spare_core() -> bool {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    rayon::current_num_threads() * local_ranks() < cores
}

/// Sets the thread count of this process before any pool starts: `--threads`, else
/// RAYON_NUM_THREADS as given, else under a launcher the cores divided among the local ranks.
fn set_threads(threads: Option<u16>) {
    let count = match threads {
        Some(n) => usize::from(n),
        None if std::env::var_os("RAYON_NUM_THREADS").is_some() => return,
        None if local_ranks() > 1 => {
            let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
            (cores / local_ranks()).max(1)
        }
        None => return,
    };
    // Read by rayon's global pool and by candle's matrix products alike; set before either
    // starts a thread.
    std::env::set_var("RAYON_NUM_THREADS", count.to_string());
}

/// The ranks of this run: MPI's world when a launcher started the process (build with the
/// `mpi` feature), else this process alone.
#[cfg(feature = "mpi")]
fn ranks(timeout: f64) -> anyhow::Result<Arc<dyn Collective>> {
    let timeout = std::time::Duration::from_secs_f64(timeout);
    Ok(
        match isogloss_acoustic::collective::MpiCollective::from_launcher(timeout)? {
            Some(world) => Arc::new(world),
            None => Arc::new(SingleProcess),
        },
    )
}

/// This process alone; a launcher's job of several processes is refused (each would train on
/// its own into the same directory).
#[cfg(not(feature = "mpi"))]
fn ranks(_timeout: f64) -> anyhow::Result<Arc<dyn Collective>> {
    let launched = LAUNCHER_SIZE_VARIABLES.iter().find_map(|name| {
        let size = std::env::var(name).ok()?.parse::<usize>().ok()?;
        (size > 1).then_some((name, size))
    });
    if let Some((name, size)) = launched {
        anyhow::bail!(
            "started by an MPI launcher as one of {size} processes ({name}), but this isogloss was built without the `mpi` feature: build it with `--features mpi` (README, \"Training on a cluster\") or run one process"
        );
    }
    Ok(Arc::new(SingleProcess))
}

/// A training budget: a positive number of minutes up to a year.
fn parse_minutes(text: &str) -> Result<f64, String> {
    let minutes: f64 = text
        .parse()
        .map_err(|_| format!("expected a number of minutes, found {text:?}"))?;
    if minutes.is_finite() && minutes > 0.0 && minutes <= 525_600.0 {
        Ok(minutes)
    } else {
        Err(format!(
            "expected minutes above 0 and at most 525600 (a year), found {text}"
        ))
    }
}

/// Keeps the memory a training step frees inside the process for the next step.
///
/// Every step allocates and frees the same few hundred MB of activations, gradients and
/// converted operands. With glibc's defaults, the blocks above its adaptive threshold are
/// mapped and unmapped each time and the top of the heap is handed back, so the next step takes
/// fresh pages from the kernel: in a one-thread epoch of `configs/tdnn-wide-robust.toml` with
/// bf16 products, 1.3 million page faults per epoch and 13 % of the CPU time in the kernel
/// (DEVELOPERS.md, "Page faults"; the f32 path faulted far less and did not change). Here blocks up to 32 MiB (glibc's largest allowed threshold on 64-bit
/// systems) come from the heap, and up to 1 GiB of free heap stays mapped.
pub(crate) fn keep_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: `mallopt` only changes allocator parameters; glibc takes its own lock.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 32 << 20);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 30);
        libc::mallopt(libc::M_TOP_PAD, 64 << 20);
    }
}

/// Runs `isogloss train`.
pub fn run(args: TrainArgs) -> anyhow::Result<Outcome> {
    keep_freed_memory();
    set_threads(args.threads);
    let collective = ranks(args.rank_timeout)?;
    if collective.size() == 1 {
        return run_ranks(args, collective);
    }
    // A rank whose run fails says why and ends the job: the others would otherwise wait at the
    // next exchange until their timeout.
    let (rank, size) = (collective.rank(), collective.size());
    match run_ranks(args, Arc::clone(&collective)) {
        Ok(outcome) => Ok(outcome),
        Err(error) => {
            eprintln!(
                "error: rank {rank} of {size}: {}; ending the job",
                crate::said_once(&error)
            );
            collective.abort(1)
        }
    }
}

fn run_ranks(args: TrainArgs, collective: Arc<dyn Collective>) -> anyhow::Result<Outcome> {
    let (rank, size) = (collective.rank(), collective.size());
    if rank == 0 && size > 1 {
        eprintln!(
            "data-parallel training: {size} ranks, threads per rank: {}",
            std::env::var("RAYON_NUM_THREADS").unwrap_or_else(|_| "every core".into())
        );
    }
    let config = match &args.config {
        Some(path) => ModelConfig::read(path)?,
        None => ModelConfig::small(),
    };
    if let Some(epochs) = args
        .epochs
        .filter(|&e| e > isogloss_acoustic::config::MAX_EPOCHS)
    {
        anyhow::bail!(
            "--epochs: expected at most {}, found {epochs}",
            isogloss_acoustic::config::MAX_EPOCHS
        );
    }
    let options = TrainOptions {
        train_manifest: args.manifest,
        dev_manifest: args.dev,
        column: args.column,
        out: args.out.clone(),
        config,
        epochs: args.epochs,
        minutes: args.minutes,
        resume: args.resume,
        seed: args.seed,
        lexicon: args.lexicon.clone(),
        start_from: args.from.clone(),
        prefetch: prefetch_wanted(args.prefetch, args.no_prefetch, spare_core()),
    };
    if let Some(untranscribed) = args.untranscribed {
        if size > 1 {
            anyhow::bail!(
                "--untranscribed (self-training) runs as one process; it is not supported with {size} ranks yet"
            );
        }
        let rule = match args.pseudo_threshold {
            Some(t) if (0.0..=1.0).contains(&t) => ThresholdRule::Fixed(t),
            Some(t) => anyhow::bail!("--pseudo-threshold: expected from 0 to 1, found {t}"),
            None if (0.0..=1.0).contains(&args.pseudo_max_wer) => {
                ThresholdRule::DevWer(args.pseudo_max_wer)
            }
            None => anyhow::bail!(
                "--pseudo-max-wer: expected a share from 0 to 1, found {}",
                args.pseudo_max_wer
            ),
        };
        if !(1..=MAX_ROUNDS).contains(&args.rounds) {
            anyhow::bail!(
                "--rounds: expected 1 to {MAX_ROUNDS}, found {}",
                args.rounds
            );
        }
        if !(args.round_rate_share > 0.0 && args.round_rate_share <= 1.0) {
            anyhow::bail!(
                "--round-rate-share: expected a share above 0 and at most 1, found {}",
                args.round_rate_share
            );
        }
        let search = SearchOptions {
            lm_weight: args.lm_weight,
            word_bonus: args.word_bonus,
            ..SearchOptions::default()
        };
        search
            .validate()
            .map_err(|e| anyhow::anyhow!("--lm-weight/--word-bonus: {e}"))?;
        let plan = SelfTraining {
            untranscribed,
            rounds: args.rounds,
            rule,
            from: args.from,
            lm: args.lm,
            lexicon: args.decode_lexicon.or(args.lexicon),
            search,
            round_rate_share: args.round_rate_share,
        };
        let options = TrainOptions {
            start_from: None,
            ..options
        };
        let records = selftrain::run(&options, &plan)
            .with_context(|| format!("self-training into {}", args.out.display()))?;
        eprintln!(
            "model: {} ({} rounds of self-training; each round in {})",
            args.out.display(),
            records.len(),
            args.out.join("round-K").display()
        );
        return Ok(Outcome::Done);
    }
    let summary = train_ranks(&options, Arc::clone(&collective))
        .with_context(|| format!("training into {}", args.out.display()))?;
    if rank > 0 {
        if !summary.failed_utterances.is_empty() {
            eprintln!(
                "rank {rank}: {} utterances of this rank's share could not be used:",
                summary.failed_utterances.len()
            );
            for failure in &summary.failed_utterances {
                eprintln!("  {failure}");
            }
            return Ok(Outcome::SomeItemsFailed);
        }
        return Ok(Outcome::Done);
    }
    if !summary.skipped_utterances.is_empty() {
        eprintln!(
            "{} training utterances were skipped: their labels do not fit their frames",
            summary.skipped_utterances.len()
        );
    }
    if summary.stopped_early {
        eprintln!("stopped early: the dev loss stopped improving");
    }
    match &summary.kept {
        Some(best) => eprintln!(
            "model: {} (epoch {}, dev unit error rate {:.2}%)",
            args.out.display(),
            best.epoch,
            100.0 * best.dev_unit_error_rate
        ),
        None => eprintln!(
            "no epoch was kept (none improved on the checkpointed model); {} unchanged",
            args.out.display()
        ),
    }
    if summary.failed_utterances.is_empty() {
        Ok(Outcome::Done)
    } else {
        eprintln!(
            "{} utterances could not be used:",
            summary.failed_utterances.len()
        );
        for failure in &summary.failed_utterances {
            eprintln!("  {failure}");
        }
        Ok(Outcome::SomeItemsFailed)
    }
}

/// Runs a training with progress bars and one line per epoch on stderr (shared by `train` and
/// `demo --train`).
pub fn train_with_progress(options: &TrainOptions) -> anyhow::Result<pipeline::TrainSummary> {
    train_ranks(options, Arc::new(SingleProcess))
}

/// [`train_with_progress`] as one rank of a data-parallel run: rank 0 draws the progress, the
/// other ranks print only their warnings, each with its rank.
fn train_ranks(
    options: &TrainOptions,
    collective: Arc<dyn Collective>,
) -> anyhow::Result<pipeline::TrainSummary> {
    let rank = collective.rank();
    if rank > 0 {
        return pipeline::train_with(options, collective, &mut |event| {
            if let PipelineEvent::Warning(message) = event {
                eprintln!("warning: rank {rank}: {message}");
            }
        })
        .map_err(anyhow::Error::from);
    }
    let mut bar: Option<ProgressBar> = None;
    pipeline::train_with(options, collective, &mut |event| match event {
        PipelineEvent::Features { split, done, total } => {
            eprintln!("features: {split}: {done}/{total} audio files");
        }
        PipelineEvent::Warning(message) => match &bar {
            Some(bar) => bar.println(format!("warning: {message}")),
            None => eprintln!("warning: {message}"),
        },
        PipelineEvent::SpeakerVectors(progress) => {
            let current = bar.get_or_insert_with(|| {
                crate::progress::bar(progress.steps as u64, "i-vector extractor")
            });
            current.set_position(progress.step as u64);
            current.set_message(progress.stage.clone());
            if progress.step == progress.steps {
                current.finish_and_clear();
                bar = None;
                eprintln!("i-vector extractor: trained ({} steps)", progress.steps);
            }
        }
        PipelineEvent::SpeakerVectorsCached => {
            eprintln!("i-vector extractor: read from the cache of an earlier run");
        }
        PipelineEvent::Training(TrainingEvent::EpochStart { epoch, frames, .. }) => {
            bar = Some(crate::progress::bar(
                *frames as u64,
                &format!("epoch {epoch}"),
            ));
        }
        PipelineEvent::Training(TrainingEvent::Batch {
            loss,
            frames,
            frames_per_second,
            ..
        }) => {
            if let Some(bar) = &bar {
                bar.inc(*frames as u64);
                bar.set_message(format!("loss {loss:.3} · {frames_per_second:.0} frames/s"));
            }
        }
        PipelineEvent::Training(TrainingEvent::BatchSkipped { utterances, .. }) => {
            let message = format!(
                "warning: skipped a batch with a non-finite loss ({})",
                utterances.join(", ")
            );
            match &bar {
                Some(bar) => bar.println(message),
                None => eprintln!("{message}"),
            }
        }
        PipelineEvent::Training(TrainingEvent::EpochEnd(record)) => {
            if let Some(bar) = bar.take() {
                bar.finish_and_clear();
            }
            eprintln!(
                "epoch {:>3}: train loss {:.4}  dev loss {:.4}  dev unit error rate {:.2}%  {:.0} frames/s{}",
                record.epoch,
                record.train_loss,
                record.dev_loss,
                100.0 * record.dev_unit_error_rate,
                record.frames_per_second,
                // With averaging the directory holds the mean, said on the next line.
                match (record.saved && record.average.is_none(), record.improved) {
                    (true, true) => "  (saved; best dev loss so far)",
                    (true, false) => "  (saved)",
                    (false, true) => "  (best dev loss so far)",
                    (false, false) => "",
                }
            );
            if let Some(average) = &record.average {
                eprintln!(
                    "           mean of the last {} epochs' weights: dev loss {:.4}  dev unit error rate {:.2}%  (saved)",
                    average.epochs,
                    average.dev_loss,
                    100.0 * average.dev_unit_error_rate
                );
            }
        }
    })
    .map_err(anyhow::Error::from)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Minor page faults of the calling thread so far.
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    fn thread_page_faults() -> i64 {
        let mut usage = std::mem::MaybeUninit::<libc::rusage>::zeroed();
        // SAFETY: `getrusage` fills the struct it is given.
        let usage = unsafe {
            assert_eq!(libc::getrusage(libc::RUSAGE_THREAD, usage.as_mut_ptr()), 0);
            usage.assume_init()
        };
        usage.ru_minflt
    }

    /// A block freed by one step and allocated again by the next comes back without fresh pages
    /// from the kernel. (With glibc's defaults the 24 MiB block below is mapped and unmapped
    /// each time: about 6 000 faults, one per 4 KiB page, on the second round.)
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    #[test]
    fn memory_freed_by_a_step_is_reused_without_page_faults() {
        keep_freed_memory();
        let step = || {
            let block = vec![1.0f32; 6 << 20];
            std::hint::black_box(&block);
        };
        step();
        let before = thread_page_faults();
        step();
        let faults = thread_page_faults() - before;
        assert!(
            faults < 600,
            "{faults} page faults for a block freed a moment ago"
        );
    }

    /// The flags win; without either, prefetch follows the free core.
    #[test]
    fn prefetch_follows_the_flags_else_a_free_core() {
        assert!(prefetch_wanted(true, false, false));
        assert!(!prefetch_wanted(false, true, true));
        assert!(prefetch_wanted(false, false, true));
        assert!(!prefetch_wanted(false, false, false));
    }

    #[test]
    fn prefetch_and_no_prefetch_cannot_be_given_together() {
        use clap::Parser;
        #[derive(Parser)]
        struct Cli {
            #[command(flatten)]
            train: TrainArgs,
        }
        let error = Cli::try_parse_from([
            "isogloss",
            "--manifest",
            "t.tsv",
            "--dev",
            "d.tsv",
            "--column",
            "c",
            "--out",
            "o",
            "--prefetch",
            "--no-prefetch",
        ])
        .err()
        .expect("the two flags conflict");
        assert_eq!(error.kind(), clap::error::ErrorKind::ArgumentConflict);
    }
}

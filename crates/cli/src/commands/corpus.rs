//! `isogloss corpus check` and `isogloss corpus split`: the manifest commands.

use std::path::PathBuf;

use anyhow::{bail, Context};
use clap::{Args, Subcommand};
use isogloss_corpus::check::{check_manifests, AudioCheck, CheckReport};
use isogloss_corpus::split::{split_by_speaker, utterance_durations, SplitConfig};
use isogloss_corpus::Manifest;

use crate::Outcome;

/// Check manifests or split one into train/dev/test.
#[derive(Args)]
pub struct CorpusArgs {
    #[command(subcommand)]
    command: CorpusCommand,
}

#[derive(Subcommand)]
enum CorpusCommand {
    /// Validate manifests: columns, ids, audio, times, transcripts; report hours, speakers and
    /// vocabulary per dialect and speakers shared between manifests. Exit 1 on errors in the
    /// manifests, 2 when the only errors are audio files that cannot be read.
    Check(CheckArgs),
    /// Write speaker-disjoint, dialect-stratified train/dev/test manifests (shares of audio
    /// duration).
    Split(SplitArgs),
}

/// Flags of `corpus check`.
#[derive(Args)]
struct CheckArgs {
    /// Manifest files (several: also look for speakers shared between them).
    #[arg(required = true, value_name = "MANIFEST")]
    manifests: Vec<PathBuf>,
    /// Print the report as JSON on stdout.
    #[arg(long)]
    json: bool,
    /// Read only audio headers instead of decoding every file (faster, finds less).
    #[arg(long)]
    headers_only: bool,
}

/// Flags of `corpus split`.
#[derive(Args)]
struct SplitArgs {
    /// The manifest to split.
    #[arg(value_name = "MANIFEST")]
    manifest: PathBuf,
    /// Folder for train.tsv, dev.tsv and test.tsv.
    #[arg(long, value_name = "DIR")]
    out: PathBuf,
    /// Share of each dialect's audio duration for the development set.
    #[arg(long, value_name = "SHARE", default_value_t = 0.1)]
    dev_share: f64,
    /// Share of each dialect's audio duration for the test set.
    #[arg(long, value_name = "SHARE", default_value_t = 0.1)]
    test_share: f64,
    /// Seed of the speaker shuffle (same seed, same split).
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Print the part figures as JSON on stdout.
    #[arg(long)]
    json: bool,
}

/// Runs a `corpus` subcommand.
pub fn run(args: CorpusArgs) -> anyhow::Result<Outcome> {
    match args.command {
        CorpusCommand::Check(args) => check(args),
        CorpusCommand::Split(args) => split(args),
    }
}

fn check(args: CheckArgs) -> anyhow::Result<Outcome> {
    let audio_check = if args.headers_only {
        AudioCheck::HeaderOnly
    } else {
        AudioCheck::Decode
    };
    let bar = crate::progress::bar(0, "audio");
    let report = check_manifests(&args.manifests, audio_check, &mut |done, total| {
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    });
    bar.finish_and_clear();
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_report(&report);
    }
    if report.errors > report.audio_errors {
        bail!(
            "{} error(s) in {}; see the list above",
            report.errors,
            names(&args.manifests)
        );
    }
    if report.audio_errors > 0 {
        // Only items failed (audio that cannot be read): the check itself ran to the end.
        eprintln!(
            "{} row(s) of {} have audio that cannot be read; see the list above",
            report.audio_errors,
            names(&args.manifests)
        );
        return Ok(Outcome::SomeItemsFailed);
    }
    Ok(Outcome::Done)
}

fn names(paths: &[PathBuf]) -> String {
    paths
        .iter()
        .map(|p| p.display().to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

/// Hours as `h:mm:ss.s`, readable for both a 5-second sample and a 300-hour archive.
fn clock(hours: f64) -> String {
    let tenths = (hours * 36_000.0).round() as u64;
    format!(
        "{}:{:02}:{:02}.{}",
        tenths / 36_000,
        tenths / 600 % 60,
        tenths / 10 % 60,
        tenths % 10
    )
}

fn print_report(report: &CheckReport) {
    for manifest in &report.manifests {
        println!(
            "{}: {} utterances, {} of audio, {} speakers, {} audio files",
            manifest.path.display(),
            manifest.utterances,
            clock(manifest.hours),
            manifest.speakers,
            manifest.audio_files
        );
        let width = manifest
            .dialects
            .iter()
            .map(|d| d.dialect.chars().count())
            .max()
            .unwrap_or(0)
            .max("dialect".len());
        println!(
            "  {:<width$}  {:>10}  {:>10}  {:>8}",
            "dialect", "utterances", "duration", "speakers"
        );
        for dialect in &manifest.dialects {
            println!(
                "  {:<width$}  {:>10}  {:>10}  {:>8}",
                dialect.dialect,
                dialect.utterances,
                clock(dialect.hours),
                dialect.speakers
            );
        }
        let vocabulary: Vec<String> = manifest
            .vocabulary
            .iter()
            .map(|v| {
                format!(
                    "{}: {} distinct words, {} in all",
                    v.column, v.types, v.tokens
                )
            })
            .collect();
        println!("  vocabulary: {}", vocabulary.join("; "));
    }
    for shared in &report.shared_speakers {
        println!(
            "shared speakers {} ↔ {}: {}",
            shared.first.display(),
            shared.second.display(),
            shared.speakers.join(", ")
        );
    }
    for problem in &report.problems {
        println!("{problem}");
    }
    println!(
        "total: {} utterances, {} of audio, {} speakers; {} error(s), {} warning(s)",
        report.utterances,
        clock(report.hours),
        report.speakers,
        report.errors,
        report.warnings
    );
}

fn split(args: SplitArgs) -> anyhow::Result<Outcome> {
    let config = SplitConfig {
        dev: args.dev_share,
        test: args.test_share,
        seed: args.seed,
    };
    config.validate()?;
    // The manifest's error names the file; the context says only what could not be done.
    let manifest = Manifest::read(&args.manifest)
        .context("cannot split the manifest (`isogloss corpus check` lists every problem)")?;
    let durations = utterance_durations(&manifest)?;
    let split = split_by_speaker(&manifest, &durations, &config)?;
    let written = split.write(&manifest, &args.out)?;
    let summary = split.summarize(&manifest, &durations);
    if args.json {
        println!("{}", serde_json::to_string_pretty(&summary)?);
        return Ok(Outcome::Done);
    }
    let total: f64 = summary.iter().map(|p| p.hours).sum();
    println!(
        "{:<6} {:>10} {:>10} {:>7} {:>8}  file",
        "part", "utterances", "duration", "share", "speakers"
    );
    for (part, path) in summary.iter().zip(&written) {
        let share = if total > 0.0 { part.hours / total } else { 0.0 };
        println!(
            "{:<6} {:>10} {:>10} {:>6.1}% {:>8}  {}",
            part.part,
            part.utterances,
            clock(part.hours),
            100.0 * share,
            part.speakers,
            path.display()
        );
    }
    for (part, asked) in [
        (&summary[1], args.dev_share),
        (&summary[2], args.test_share),
    ] {
        if part.utterances == 0 && asked > 0.0 {
            eprintln!(
                "warning: the {} set is empty: too few speakers per dialect for the shares asked",
                part.part
            );
        }
    }
    Ok(Outcome::Done)
}

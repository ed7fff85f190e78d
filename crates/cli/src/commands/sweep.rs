//! `isogloss sweep --config FILE.toml`: an ablation grid over cached acoustic posteriors.

use std::path::PathBuf;
use std::sync::Mutex;

use clap::Args;
use isogloss_sweep::report::{chart, csv, markdown};
use isogloss_sweep::{run, Sweep, SweepEvent};

use crate::Outcome;

/// Decode and score a grid of LM, lexicon, writing and decoder choices.
#[derive(Args)]
pub struct SweepArgs {
    /// The sweep file (TOML): models, test and dev manifests, and the axes to cross.
    #[arg(long)]
    config: PathBuf,
    /// Also print the results as JSON on stdout (instead of the Markdown table).
    #[arg(long)]
    json: bool,
}

/// Runs the sweep, writes `results.md`, `results.csv`, `results.json` and `chart.svg` into the
/// sweep's output folder and prints the table. Cells that failed are marked in every output and
/// listed at the end; the sweep then ends with [`Outcome::SomeItemsFailed`] (exit code 2).
pub fn run(args: SweepArgs) -> anyhow::Result<Outcome> {
    let sweep = Sweep::read(&args.config)?;
    let bar = Mutex::new(None::<indicatif::ProgressBar>);
    let results = run::run(&sweep, &|event| match event {
        SweepEvent::AcousticPass {
            model,
            computed,
            seconds,
        } => {
            eprintln!("acoustic pass, model {model}: {computed} utterances computed in {seconds:.1} s (the rest from the cache)");
        }
        SweepEvent::Cells(count) => {
            if let Ok(mut slot) = bar.lock() {
                *slot = Some(crate::progress::bar(count as u64, "cells"));
            }
        }
        SweepEvent::CellDone { label, cached } => {
            if let Ok(slot) = bar.lock() {
                if let Some(bar) = slot.as_ref() {
                    bar.set_message(format!("{label}{}", if cached { " (cached)" } else { "" }));
                    bar.inc(1);
                }
            }
        }
        SweepEvent::CellFailed { label, reason } => {
            let line = format!("cell {label} failed: {reason}");
            match bar.lock().ok().as_ref().and_then(|slot| slot.as_ref()) {
                Some(bar) => {
                    bar.println(line);
                    bar.inc(1);
                }
                None => eprintln!("{line}"),
            }
        }
        SweepEvent::Note(note) => eprintln!("note: {note}"),
    })?;
    if let Ok(slot) = bar.lock() {
        if let Some(bar) = slot.as_ref() {
            bar.finish_and_clear();
        }
    }
    let out = &sweep.out_dir;
    let write = |name: &str, text: String| -> anyhow::Result<()> {
        let path = out.join(name);
        // The error names the file.
        Ok(isogloss_corpus::tsv::write_atomically(
            &path,
            text.as_bytes(),
        )?)
    };
    let table = markdown(&results);
    write("results.md", table.clone())?;
    write("results.csv", csv(&results))?;
    let json = serde_json::to_string_pretty(&results)?;
    write("results.json", json.clone())?;
    write("chart.svg", chart(&results))?;
    if args.json {
        println!("{json}");
    } else {
        println!("{table}");
        eprintln!("results written to {}", out.display());
    }
    if results.failed.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!(
        "{} of {} cells failed (the others are in the results; a new run decodes only the failed ones):",
        results.failed.len(),
        results.failed.len() + results.cells.len()
    );
    for failed in &results.failed {
        eprintln!("  {}: {}", failed.label(), failed.reason);
    }
    Ok(Outcome::SomeItemsFailed)
}

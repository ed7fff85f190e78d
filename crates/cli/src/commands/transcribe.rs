//! `isogloss transcribe`: greedy (best-path) transcription of a manifest with an acoustic model.

use std::path::PathBuf;

use anyhow::Context;
use clap::Args;
use isogloss_acoustic::pipeline::manifest_posteriors;
use isogloss_acoustic::{greedy_decode, AcousticModel};
use isogloss_corpus::Manifest;

use crate::Outcome;

/// Transcribe the utterances of a manifest.
#[derive(Args)]
pub struct TranscribeArgs {
    /// Model directory written by `isogloss train`.
    #[arg(long)]
    model: PathBuf,
    /// Manifest (TSV) of the utterances to transcribe.
    #[arg(long)]
    manifest: PathBuf,
    /// Hypotheses file to write (`id<TAB>text`).
    #[arg(long)]
    out: PathBuf,
}

/// Runs `isogloss transcribe`.
pub fn run(args: TranscribeArgs) -> anyhow::Result<Outcome> {
    let model = AcousticModel::load(&args.model)?;
    let manifest = Manifest::read(&args.manifest)?;
    let bar = crate::progress::bar(0, "features");
    let posteriors = manifest_posteriors(&model, &manifest, &|done, total| {
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    })?;
    bar.finish_and_clear();
    let mut text = String::from("id\ttext\n");
    let mut failures = Vec::new();
    for (utterance, result) in manifest.utterances.iter().zip(posteriors) {
        match result {
            Ok(log_posteriors) => {
                let units = greedy_decode(&log_posteriors, model.units());
                let words = model.inventory().to_text(&units);
                text.push_str(&format!("{}\t{}\n", utterance.id, words));
            }
            Err(message) => failures.push(message),
        }
    }
    isogloss_corpus::tsv::write_atomically(&args.out, text.as_bytes())
        .with_context(|| format!("writing {}", args.out.display()))?;
    if failures.is_empty() {
        Ok(Outcome::Done)
    } else {
        eprintln!("{} utterances could not be transcribed:", failures.len());
        for failure in &failures {
            eprintln!("  {failure}");
        }
        Ok(Outcome::SomeItemsFailed)
    }
}

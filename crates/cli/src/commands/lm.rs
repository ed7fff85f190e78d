//! `isogloss lm build | eval | mix | prune`: n-gram language models.

use std::path::PathBuf;
use std::time::Instant;

use anyhow::{bail, Context};
use clap::{Args, Subcommand, ValueEnum};
use isogloss_lm::{
    estimate_weights, evaluate_sentences, merge, prune, read_sentences, read_vocabulary,
    write_estimated_arpa, ArpaModel, CountOptions, EstimateOptions, NgramCounts, Perplexity,
    Smoothing,
};
use serde_json::json;

use crate::Outcome;

/// N-gram language models: build, evaluate, mix, prune.
#[derive(Args)]
pub struct LmArgs {
    #[command(subcommand)]
    command: LmCommand,
}

#[derive(Subcommand)]
enum LmCommand {
    /// Count a text and write a smoothed ARPA model.
    Build(BuildArgs),
    /// Perplexity, OOV rate and token count of a text under one or more models.
    Eval(EvalArgs),
    /// Interpolate models with weights tuned by EM on a text; write one merged model.
    Mix(MixArgs),
    /// Remove n-grams whose removal changes the model little (relative-entropy pruning).
    Prune(PruneArgs),
}

#[derive(Clone, Copy, ValueEnum)]
enum SmoothingName {
    /// Interpolated modified Kneser-Ney (D1, D2, D3+ per order).
    ModifiedKneserNey,
    /// Interpolated Kneser-Ney (one discount per order).
    KneserNey,
    /// Interpolated Witten-Bell.
    WittenBell,
    /// Additive smoothing, interpolated with the lower order (see --add-k).
    AddK,
}

#[derive(Args)]
struct BuildArgs {
    /// Training sentences, one a line (repeat for several files; .gz is read too).
    #[arg(long = "sentences", value_name = "FILE", required = true)]
    sentence_files: Vec<PathBuf>,
    /// N-gram order, 1 to 6.
    #[arg(long)]
    order: usize,
    /// Smoothing method.
    #[arg(long, value_enum, default_value = "modified-kneser-ney")]
    smoothing: SmoothingName,
    /// The pseudo-count k of add-k smoothing.
    #[arg(long, default_value_t = 1.0)]
    add_k: f64,
    /// Closed vocabulary (one word a line); other words become <unk>.
    #[arg(long, value_name = "FILE")]
    word_list: Option<PathBuf>,
    /// Minimum count per order, comma-separated, unigrams first (e.g. 1,1,2,2).
    #[arg(long, value_name = "COUNTS")]
    min_counts: Option<String>,
    /// Output ARPA file (.gz compresses).
    #[arg(long)]
    out: PathBuf,
}

#[derive(Args)]
struct EvalArgs {
    /// ARPA model(s); several print a comparison table.
    #[arg(long = "arpa", value_name = "FILE", required = true)]
    models: Vec<PathBuf>,
    /// Sentences to score, one a line.
    #[arg(long, value_name = "FILE")]
    sentences: PathBuf,
    /// Print JSON on stdout.
    #[arg(long)]
    json: bool,
}

#[derive(Args)]
struct MixArgs {
    /// Component ARPA models (at least two).
    #[arg(long = "arpa", value_name = "FILE", required = true, num_args = 1)]
    models: Vec<PathBuf>,
    /// Held-out sentences (one a line) the mixture weights are fitted to by EM.
    #[arg(long, value_name = "FILE")]
    fit_sentences: PathBuf,
    /// Output ARPA file.
    #[arg(long)]
    out: PathBuf,
    /// Print JSON on stdout.
    #[arg(long)]
    json: bool,
}

#[derive(Args)]
struct PruneArgs {
    /// The ARPA model to prune.
    #[arg(long = "arpa", value_name = "FILE")]
    model: PathBuf,
    /// Largest increase of relative entropy (nats) that removing one n-gram may cause; larger
    /// prunes more (e.g. 1e-8 … 1e-6).
    #[arg(long, value_name = "NATS")]
    max_entropy_loss: f64,
    /// Output ARPA file.
    #[arg(long)]
    out: PathBuf,
    /// Sentences for the perplexity before and after.
    #[arg(long, value_name = "FILE")]
    sentences: Option<PathBuf>,
    /// Print JSON on stdout.
    #[arg(long)]
    json: bool,
}

/// Runs an `lm` subcommand.
pub fn run(args: LmArgs) -> anyhow::Result<Outcome> {
    match args.command {
        LmCommand::Build(args) => build(args),
        LmCommand::Eval(args) => eval(args),
        LmCommand::Mix(args) => mix(args),
        LmCommand::Prune(args) => prune_command(args),
    }
}

fn parse_min_counts(text: &str) -> anyhow::Result<Vec<u32>> {
    text.split(',')
        .map(|field| {
            field.trim().parse::<u32>().with_context(|| {
                format!("--min-counts: expected whole numbers separated by commas, found '{field}'")
            })
        })
        .collect()
}

fn read_model(path: &PathBuf) -> anyhow::Result<ArpaModel> {
    let model = ArpaModel::read(path)?;
    if model.implied_ngrams() > 0 {
        eprintln!(
            "note: {}: {} n-grams were missing as prefix or suffix of listed ones; added with their back-off probabilities",
            path.display(),
            model.implied_ngrams()
        );
    }
    Ok(model)
}

fn counts_text(counts: &[usize]) -> String {
    counts
        .iter()
        .enumerate()
        .map(|(position, count)| format!("{}-grams {count}", position + 1))
        .collect::<Vec<_>>()
        .join(", ")
}

fn build(args: BuildArgs) -> anyhow::Result<Outcome> {
    let smoothing = match args.smoothing {
        SmoothingName::ModifiedKneserNey => Smoothing::ModifiedKneserNey,
        SmoothingName::KneserNey => Smoothing::KneserNey,
        SmoothingName::WittenBell => Smoothing::WittenBell,
        SmoothingName::AddK => Smoothing::Additive { k: args.add_k },
    };
    let cutoffs = args
        .min_counts
        .as_deref()
        .map(parse_min_counts)
        .transpose()?
        .unwrap_or_default();
    if cutoffs.len() > args.order {
        bail!(
            "--min-counts: expected at most {} values (one per order), found {}",
            args.order,
            cutoffs.len()
        );
    }
    let vocabulary = args.word_list.as_deref().map(read_vocabulary).transpose()?;
    let started = Instant::now();
    let counts = NgramCounts::from_text_files(
        &args.sentence_files,
        args.order,
        &CountOptions { vocabulary },
    )?;
    eprintln!(
        "counted {} sentences, {} tokens in {:.1} s",
        counts.sentences(),
        counts.tokens(),
        started.elapsed().as_secs_f64()
    );
    let options = EstimateOptions {
        smoothing,
        cutoffs,
        keep_interpolated: false,
    };
    // Streamed straight to the file: no query structure is built, which keeps memory low.
    let estimated = write_estimated_arpa(&counts, &options, &args.out)?;
    for warning in &estimated.warnings {
        eprintln!("warning: {warning}");
    }
    if matches!(
        smoothing,
        Smoothing::ModifiedKneserNey | Smoothing::KneserNey
    ) {
        for (position, discounts) in estimated.discounts.iter().enumerate() {
            eprintln!(
                "order {}: D1 {:.4}, D2 {:.4}, D3+ {:.4}",
                position + 1,
                discounts.d1,
                discounts.d2,
                discounts.d3_plus
            );
        }
    }
    eprintln!(
        "wrote {} ({}) in {:.1} s",
        args.out.display(),
        counts_text(&estimated.ngram_counts),
        started.elapsed().as_secs_f64()
    );
    Ok(Outcome::Done)
}

fn report(score: &Perplexity) -> serde_json::Value {
    json!({
        "perplexity": score.perplexity(),
        "oov_rate": score.oov_rate(),
        "tokens": score.tokens,
        "oov_words": score.oov_words,
        "sentences": score.sentences,
    })
}

fn eval(args: EvalArgs) -> anyhow::Result<Outcome> {
    let sentences = read_sentences(&args.sentences)?;
    let mut rows = Vec::new();
    for path in &args.models {
        let model = read_model(path)?;
        rows.push((path, evaluate_sentences(&model, sentences.iter().cloned())));
    }
    if args.json {
        let value = if let [(_, score)] = rows.as_slice() {
            report(score)
        } else {
            json!(rows
                .iter()
                .map(|(path, score)| {
                    let mut row = report(score);
                    row["arpa"] = json!(path.display().to_string());
                    row
                })
                .collect::<Vec<_>>())
        };
        println!("{value}");
    } else {
        let width = rows
            .iter()
            .map(|(path, _)| path.display().to_string().len())
            .max()
            .unwrap_or(0)
            .max(5);
        println!(
            "{:<width$}  {:>12}  {:>8}  {:>10}",
            "model", "perplexity", "OOV %", "tokens"
        );
        for (path, score) in &rows {
            println!(
                "{:<width$}  {:>12.3}  {:>8.3}  {:>10}",
                path.display().to_string(),
                score.perplexity(),
                100.0 * score.oov_rate(),
                score.tokens
            );
        }
    }
    Ok(Outcome::Done)
}

fn mix(args: MixArgs) -> anyhow::Result<Outcome> {
    if args.models.len() < 2 {
        bail!(
            "lm mix: expected at least two --arpa models, found {}",
            args.models.len()
        );
    }
    let models = args
        .models
        .iter()
        .map(read_model)
        .collect::<anyhow::Result<Vec<_>>>()?;
    let tuning = read_sentences(&args.fit_sentences)?;
    let estimated = estimate_weights(&models, &tuning)?;
    let merged = merge(&models, &estimated.weights, &tuning)?;
    merged.write_arpa(&args.out)?;
    let merged_score = evaluate_sentences(&merged, tuning.iter().cloned());
    let components: Vec<Perplexity> = models
        .iter()
        .map(|model| evaluate_sentences(model, tuning.iter().cloned()))
        .collect();
    if args.json {
        let rows: Vec<_> = args
            .models
            .iter()
            .zip(&estimated.weights)
            .zip(&components)
            .map(|((path, weight), score)| json!({"arpa": path.display().to_string(), "weight": weight, "perplexity": score.perplexity()}))
            .collect();
        println!(
            "{}",
            json!({"components": rows, "iterations": estimated.iterations, "perplexity": merged_score.perplexity(),
                   "tokens": merged_score.tokens, "ngram_counts": merged.ngram_counts()})
        );
    } else {
        println!("{:<40}  {:>8}  {:>12}", "model", "weight", "perplexity");
        for ((path, weight), score) in args.models.iter().zip(&estimated.weights).zip(&components) {
            println!(
                "{:<40}  {:>8.4}  {:>12.3}",
                path.display().to_string(),
                weight,
                score.perplexity()
            );
        }
        println!(
            "{:<40}  {:>8}  {:>12.3}",
            "mixture (merged)",
            "",
            merged_score.perplexity()
        );
        println!(
            "EM: {} iterations; wrote {} ({})",
            estimated.iterations,
            args.out.display(),
            counts_text(&merged.ngram_counts())
        );
    }
    Ok(Outcome::Done)
}

fn prune_command(args: PruneArgs) -> anyhow::Result<Outcome> {
    let model = read_model(&args.model)?;
    let pruned = prune(&model, args.max_entropy_loss)?;
    pruned.write_arpa(&args.out)?;
    let text = args.sentences.as_deref().map(read_sentences).transpose()?;
    let before_score = text
        .as_ref()
        .map(|text| evaluate_sentences(&model, text.iter().cloned()));
    let after_score = text
        .as_ref()
        .map(|text| evaluate_sentences(&pruned, text.iter().cloned()));
    if args.json {
        println!(
            "{}",
            json!({
                "before": {"ngram_counts": model.ngram_counts(), "perplexity": before_score.map(|s| s.perplexity())},
                "after": {"ngram_counts": pruned.ngram_counts(), "perplexity": after_score.map(|s| s.perplexity())},
            })
        );
    } else {
        println!("before: {}", counts_text(&model.ngram_counts()));
        println!("after:  {}", counts_text(&pruned.ngram_counts()));
        if let (Some(before), Some(after)) = (before_score, after_score) {
            println!(
                "perplexity: {:.3} before, {:.3} after",
                before.perplexity(),
                after.perplexity()
            );
        }
        println!("wrote {}", args.out.display());
    }
    Ok(Outcome::Done)
}

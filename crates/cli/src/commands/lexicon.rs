//! `isogloss lexicon …`: make pronunciation lexicons (by rules or a trained G2P model) and
//! measure how well a lexicon covers a corpus.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use clap::{Args, Subcommand};
use isogloss_corpus::tsv::{write_table, Table};
use isogloss_lexicon::graphone::{evaluate, DecodeConfig, G2pConfig, G2pModel};
use isogloss_lexicon::rules::RuleSet;
use isogloss_lexicon::{read_word_list, Coverage, Lexicon, LexiconError};
use isogloss_score::{tokenize, TokenRules};

use crate::Outcome;

/// Make and check pronunciation lexicons.
#[derive(Args)]
pub struct LexiconArgs {
    #[command(subcommand)]
    command: LexiconCommand,
}

#[derive(Subcommand)]
enum LexiconCommand {
    /// Pronounce a word list with an ordered rule file (for writing that follows the sound).
    Rules(RulesArgs),
    /// Train a joint-sequence (graphone) G2P model on a pronunciation dictionary.
    TrainG2p(TrainArgs),
    /// Pronounce a word list with a trained G2P model.
    ApplyG2p(ApplyArgs),
    /// Type and token coverage of a manifest column by a lexicon, with the missing words.
    Coverage(CoverageArgs),
}

#[derive(Args)]
struct RulesArgs {
    /// Words to pronounce (white-space separated; one a line or running text).
    #[arg(long)]
    words: PathBuf,
    /// The rule file (TOML; see `configs/rules-demo-dialectal.toml`).
    #[arg(long)]
    rules: PathBuf,
    /// The lexicon to write (`word<TAB>units`).
    #[arg(long)]
    out: PathBuf,
}

#[derive(Args)]
struct TrainArgs {
    /// The lexicon to learn from (`word<TAB>units`, e.g. a pronunciation dictionary).
    #[arg(long)]
    lexicon: PathBuf,
    /// The model file to write.
    #[arg(long)]
    out: PathBuf,
    /// N-gram order over graphones.
    #[arg(long, default_value_t = G2pConfig::default().order)]
    order: usize,
    /// EM iterations of the letter–phoneme alignment.
    #[arg(long, default_value_t = G2pConfig::default().iterations)]
    iterations: usize,
    /// Factor in (0, 1] on the alignment probability for each graphone side that holds two
    /// letters or two units (smaller favours one-to-one alignments).
    #[arg(long, default_value_t = G2pConfig::default().multi_symbol_penalty)]
    two_symbol_weight: f64,
    /// Hold out this share of the words, train on the rest and report error rates on them.
    #[arg(long)]
    held_out: Option<f64>,
    /// Seed of the held-out choice.
    #[arg(long, default_value_t = 1)]
    seed: u64,
}

#[derive(Args)]
struct ApplyArgs {
    /// The model written by `train-g2p`.
    #[arg(long)]
    model: PathBuf,
    /// Words to pronounce (white-space separated).
    #[arg(long)]
    words: PathBuf,
    /// The lexicon to write.
    #[arg(long)]
    out: PathBuf,
    /// Pronunciations per word (the most probable first).
    #[arg(long, default_value_t = 1)]
    nbest: usize,
    /// Hypotheses kept per letter in the beam search.
    #[arg(long, default_value_t = DecodeConfig::default().beam)]
    beam: usize,
    /// Also write `word<TAB>rank<TAB>log10 probability<TAB>units` (with a header) here.
    #[arg(long)]
    scores: Option<PathBuf>,
}

#[derive(Args)]
struct CoverageArgs {
    /// The lexicon.
    #[arg(long)]
    lexicon: PathBuf,
    /// The manifest whose transcripts are counted.
    #[arg(long)]
    manifest: PathBuf,
    /// The transcript column (e.g. `dialectal` or `normalized`).
    #[arg(long)]
    column: String,
    /// Print a JSON object on stdout instead of the text report.
    #[arg(long)]
    json: bool,
}

/// Runs one `isogloss lexicon` command.
pub fn run(args: LexiconArgs) -> anyhow::Result<Outcome> {
    match args.command {
        LexiconCommand::Rules(args) => rules(args),
        LexiconCommand::TrainG2p(args) => train(args),
        LexiconCommand::ApplyG2p(args) => apply(args),
        LexiconCommand::Coverage(args) => coverage(args),
    }
}

fn words_or_fail(path: &Path) -> anyhow::Result<Vec<String>> {
    let words = read_word_list(path)?;
    if words.is_empty() {
        bail!("{}: expected at least one word, found none", path.display());
    }
    Ok(words)
}

fn rules(args: RulesArgs) -> anyhow::Result<Outcome> {
    let rules = RuleSet::read(&args.rules)?;
    let words = words_or_fail(&args.words)?;
    let (lexicon, uncovered) = rules.lexicon(words.iter().map(String::as_str));
    lexicon.write(&args.out)?;
    eprintln!(
        "{}: {} of {} words pronounced",
        args.out.display(),
        lexicon.words().len(),
        words.len()
    );
    if uncovered.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!(
        "{} words got no pronunciation from {}:",
        uncovered.len(),
        args.rules.display()
    );
    for word in &uncovered {
        eprintln!("  {}: {}", word.word, word.failure);
    }
    Ok(Outcome::SomeItemsFailed)
}

fn train(args: TrainArgs) -> anyhow::Result<Outcome> {
    let dictionary = Lexicon::read(&args.lexicon)?;
    if dictionary.entries.is_empty() {
        return Err(LexiconError::EmptyDictionary { path: args.lexicon }.into());
    }
    let config = G2pConfig {
        order: args.order,
        iterations: args.iterations,
        multi_symbol_penalty: args.two_symbol_weight,
        ..G2pConfig::default()
    };
    let (training, held_out) = match args.held_out {
        Some(share) if (0.0..1.0).contains(&share) => dictionary.split_held_out(share, args.seed),
        Some(share) => bail!("--held-out: expected a share in [0, 1), found {share}"),
        None => (dictionary, Lexicon::default()),
    };
    let bar = crate::progress::bar((config.iterations + 2) as u64, "train-g2p");
    let (model, skipped) = G2pModel::train(&training, &config, &mut |progress| {
        bar.set_position(progress.step as u64);
        bar.set_message(progress.message.clone());
        bar.println(&progress.message);
    })
    .with_context(|| format!("training on {}", args.lexicon.display()))?;
    bar.finish_and_clear();
    model.write(&args.out)?;
    eprintln!(
        "{}: {} graphones, {}-gram",
        args.out.display(),
        model.graphones().len(),
        model.order()
    );
    if !held_out.entries.is_empty() {
        let result = evaluate(&model, &held_out, &DecodeConfig::default());
        println!(
            "held-out words: {}  word error rate: {:.2}%  phoneme error rate: {:.2}%",
            result.words,
            100.0 * result.word_error_rate(),
            100.0 * result.phoneme_error_rate()
        );
    }
    if skipped.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!(
        "{} entries of {} were skipped (a word without letters cannot be aligned):",
        skipped.len(),
        args.lexicon.display()
    );
    for word in &skipped {
        eprintln!("  {word}");
    }
    Ok(Outcome::SomeItemsFailed)
}

fn apply(args: ApplyArgs) -> anyhow::Result<Outcome> {
    if args.nbest == 0 || args.beam == 0 {
        bail!("--nbest and --beam: expected at least 1");
    }
    let model = G2pModel::read(&args.model)?;
    let words = words_or_fail(&args.words)?;
    let config = DecodeConfig {
        beam: args.beam,
        nbest: args.nbest,
    };
    let bar = crate::progress::bar(words.len() as u64, "apply-g2p");
    let mut entries = Vec::new();
    let mut scores = Vec::new();
    let mut failed = Vec::new();
    for word in &words {
        match model.pronounce(word, &config) {
            Ok(pronunciations) => {
                for (rank, pronunciation) in pronunciations.into_iter().enumerate() {
                    scores.push(vec![
                        word.clone(),
                        (rank + 1).to_string(),
                        format!("{:.4}", pronunciation.log10_probability),
                        pronunciation.phonemes.join(" "),
                    ]);
                    entries.push((word.clone(), pronunciation.phonemes));
                }
            }
            Err(failure) => failed.push((word, failure)),
        }
        bar.inc(1);
    }
    bar.finish_and_clear();
    Lexicon::from_entries(entries).write(&args.out)?;
    if let Some(path) = &args.scores {
        write_table(
            path,
            &["word", "rank", "log10_probability", "units"],
            &scores,
        )?;
    }
    eprintln!(
        "{}: {} of {} words pronounced",
        args.out.display(),
        words.len() - failed.len(),
        words.len()
    );
    if failed.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!("{} words got no pronunciation:", failed.len());
    for (word, failure) in &failed {
        eprintln!("  {word}: {failure}");
    }
    Ok(Outcome::SomeItemsFailed)
}

const RULE_OF_THUMB: &str = "coverage near 100% on training data and around 80% on held-out \
                             data is typical for corpora like these";

fn coverage(args: CoverageArgs) -> anyhow::Result<Outcome> {
    let lexicon = Lexicon::read(&args.lexicon)?;
    let table = Table::read_with_header(&args.manifest)?;
    let column = table.column(&args.column)?;
    // The scorer's token rules, so that coverage counts exactly the words WER will count.
    let rules = TokenRules::default();
    let tokens: Vec<String> = table
        .records
        .iter()
        .flat_map(|record| tokenize(&record.fields[column], &rules))
        .collect();
    let counted = Coverage::count(&lexicon, tokens.iter().map(String::as_str));
    if args.json {
        let report = serde_json::json!({
            "lexicon": args.lexicon,
            "manifest": args.manifest,
            "column": args.column,
            "tokens": counted.tokens,
            "covered_tokens": counted.covered_tokens,
            "token_coverage": counted.token_rate(),
            "types": counted.types,
            "covered_types": counted.covered_types,
            "type_coverage": counted.type_rate(),
            "oov": counted.oov.iter().map(|(word, count)| serde_json::json!({"word": word, "count": count})).collect::<Vec<_>>(),
            "rule_of_thumb": RULE_OF_THUMB,
        });
        println!("{}", serde_json::to_string_pretty(&report)?);
        return Ok(Outcome::Done);
    }
    println!(
        "coverage of column `{}` of {} by {}",
        args.column,
        args.manifest.display(),
        args.lexicon.display()
    );
    println!(
        "  tokens: {:6.2}%  ({} of {})",
        100.0 * counted.token_rate(),
        counted.covered_tokens,
        counted.tokens
    );
    println!(
        "  types:  {:6.2}%  ({} of {})",
        100.0 * counted.type_rate(),
        counted.covered_types,
        counted.types
    );
    println!("  rule of thumb: {RULE_OF_THUMB}");
    if !counted.oov.is_empty() {
        const SHOWN: usize = 50;
        println!("out-of-vocabulary words, most frequent first:");
        for (word, count) in counted.oov.iter().take(SHOWN) {
            println!("  {count:6}  {word}");
        }
        if counted.oov.len() > SHOWN {
            println!(
                "  … and {} more (--json lists them all)",
                counted.oov.len() - SHOWN
            );
        }
    }
    Ok(Outcome::Done)
}

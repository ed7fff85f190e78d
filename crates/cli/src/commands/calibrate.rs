//! `isogloss calibrate`: fits the calibration (temperature and shift) of the word certainties
//! on a transcribed dev split, measures calibration (ECE, reliability chart) on dev and, if given, a test split.
//! The statistics live in `isogloss_confidence`.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::Context;
use clap::Args;
use isogloss_confidence::{
    reliability, reliability_svg, word_outcomes, Calibration, CalibrationRecord, Reliability,
    WordOutcome,
};
use isogloss_decoder::output::TranscriptDocument;
use isogloss_score::{Reference, TokenRules, VariantMap};
use serde::Serialize;

use crate::Outcome;

/// Flags of `isogloss calibrate`.
#[derive(Args, Debug)]
pub struct CalibrateArgs {
    /// Transcript JSON of the dev split (`isogloss transcribe --manifest dev.tsv --format json`).
    #[arg(long, value_name = "dev.json")]
    pub transcript: PathBuf,
    /// The dev manifest (the reference).
    #[arg(long, value_name = "dev.tsv")]
    pub reference: PathBuf,
    /// The transcript column the words are judged against.
    #[arg(long)]
    pub column: String,
    /// Count permissible spelling variants as right (`variant<TAB>normalized`).
    #[arg(long, value_name = "variants.tsv")]
    pub variants: Option<PathBuf>,
    /// Also measure on a held-out split: its transcript JSON …
    #[arg(long, value_name = "test.json", requires = "test_reference")]
    pub test_transcript: Option<PathBuf>,
    /// … and its manifest.
    #[arg(long, value_name = "test.tsv", requires = "test_transcript")]
    pub test_reference: Option<PathBuf>,
    /// Fit the temperature alone (shift 0), not temperature and shift.
    #[arg(long)]
    pub temperature_only: bool,
    /// Equal-width bins of the reliability table.
    #[arg(long, default_value_t = 10)]
    pub bins: usize,
    /// Folder for calibration.toml, reliability.svg and calibration.md.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Print the figures as JSON on stdout.
    #[arg(long)]
    pub json: bool,
}

/// Figures of one split.
#[derive(Debug, Serialize)]
struct SplitFigures {
    split: String,
    words: usize,
    share_right: f64,
    ece_raw: f64,
    ece_calibrated: f64,
    #[serde(skip)]
    raw: Reliability,
    #[serde(skip)]
    calibrated: Reliability,
}

/// Outcomes of every word of the transcript's items that the reference has. Items the
/// reference lacks are reported and left out.
fn outcomes(
    transcript: &Path,
    reference: &Path,
    column: &str,
    variants: &VariantMap,
) -> anyhow::Result<Vec<WordOutcome>> {
    let document = TranscriptDocument::read(transcript)?;
    let reference = Reference::read(reference, column, &[])?;
    let texts: HashMap<&str, &str> = reference
        .utterances
        .iter()
        .map(|u| (u.id.as_str(), u.text.as_str()))
        .collect();
    let rules = TokenRules::default();
    let mut all = Vec::new();
    let mut missing = Vec::new();
    for item in &document.items {
        let Some(text) = texts.get(item.id.as_str()) else {
            missing.push(item.id.as_str());
            continue;
        };
        let words: Vec<_> = item.segments.iter().flat_map(|s| s.words.clone()).collect();
        all.extend(word_outcomes(text, &words, variants, &rules));
    }
    if !missing.is_empty() {
        eprintln!(
            "warning: {}: {} items have no row in {} and are left out (first: `{}`)",
            transcript.display(),
            missing.len(),
            reference.path.display(),
            missing[0]
        );
    }
    if all.is_empty() {
        anyhow::bail!(
            "{}: no word of the transcript has a reference in {} (expected item ids that are manifest ids)",
            transcript.display(),
            reference.path.display()
        );
    }
    Ok(all)
}

fn figures(split: &str, words: &[WordOutcome], t: &Calibration, bins: usize) -> SplitFigures {
    let raw = reliability(words, &Calibration::IDENTITY, bins);
    let calibrated = reliability(words, t, bins);
    SplitFigures {
        split: split.into(),
        words: words.len(),
        share_right: words.iter().filter(|w| w.correct).count() as f64 / words.len() as f64,
        ece_raw: raw.ece,
        ece_calibrated: calibrated.ece,
        raw,
        calibrated,
    }
}

/// Runs `isogloss calibrate`.
pub fn run(args: CalibrateArgs) -> anyhow::Result<Outcome> {
    if args.bins == 0 {
        anyhow::bail!("--bins: expected at least 1, found 0");
    }
    let variants = match &args.variants {
        Some(path) => VariantMap::read(path, &TokenRules::default())?,
        None => VariantMap::new(),
    };
    let dev = outcomes(&args.transcript, &args.reference, &args.column, &variants)?;
    let calibration = if args.temperature_only {
        Calibration::fit_temperature(&dev)
    } else {
        Calibration::fit(&dev)
    }
    .with_context(|| format!("{}", args.transcript.display()))?;
    let mut splits = vec![figures("dev", &dev, &calibration, args.bins)];
    if let (Some(transcript), Some(reference)) = (&args.test_transcript, &args.test_reference) {
        let test = outcomes(transcript, reference, &args.column, &variants)?;
        splits.push(figures("test", &test, &calibration, args.bins));
    }
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("{}: cannot create the folder", args.out.display()))?;
    let record = CalibrationRecord {
        temperature: calibration.temperature(),
        shift: calibration.shift(),
        words: dev.len(),
        dev_ece_before: splits[0].ece_raw,
        dev_ece_after: splits[0].ece_calibrated,
    };
    Calibration::write(&args.out.join("calibration.toml"), &record)?;
    let shown = splits.last().expect("dev is always there");
    let svg = reliability_svg(
        &format!("Word confidence on {} ({} words)", shown.split, shown.words),
        &[
            ("raw certainty", &shown.raw),
            (
                &format!("calibrated, {}", calibration.describe()),
                &shown.calibrated,
            ),
        ],
    );
    let chart = args.out.join("reliability.svg");
    std::fs::write(&chart, svg).with_context(|| format!("{}: cannot write", chart.display()))?;
    let mut markdown = format!(
        "# Word-confidence calibration\n\nFitted on dev ({} words of {}): **T = {:.3}, shift {:+.3}** \
         (confidence = σ(logit(certainty) / T + shift){}). A word is right when the scoring alignment with \
         the `{}` column matches it{}. ECE over {} equal-width bins.\n\n\
         | split | words | share right | ECE raw | ECE calibrated |\n|---|---:|---:|---:|---:|\n",
        dev.len(),
        args.transcript.display(),
        calibration.temperature(),
        calibration.shift(),
        if args.temperature_only {
            ", temperature only"
        } else {
            ""
        },
        args.column,
        if args.variants.is_some() {
            " exactly or as a permissible variant"
        } else {
            " exactly"
        },
        args.bins
    );
    for s in &splits {
        let _ = writeln!(
            markdown,
            "| {} | {} | {:.3} | {:.3} | {:.3} |",
            s.split, s.words, s.share_right, s.ece_raw, s.ece_calibrated
        );
    }
    let _ = writeln!(
        markdown,
        "\n![reliability chart, {}](reliability.svg)",
        shown.split
    );
    let report = args.out.join("calibration.md");
    std::fs::write(&report, &markdown)
        .with_context(|| format!("{}: cannot write", report.display()))?;
    if args.json {
        println!(
            "{}",
            serde_json::to_string_pretty(&serde_json::json!({
                "temperature": calibration.temperature(),
                "shift": calibration.shift(),
                "splits": splits,
            }))?
        );
    } else {
        print!("{markdown}");
    }
    eprintln!(
        "wrote {}, {} and {}",
        args.out.join("calibration.toml").display(),
        chart.display(),
        report.display()
    );
    Ok(Outcome::Done)
}

//! `isogloss score`: WER and flexible WER of hypotheses against a manifest column, overall and
//! per group, with bootstrap intervals and an optional paired comparison. The numbers come from
//! `isogloss_score`; this module only reads flags and prints (Markdown, JSON or CSV).

use std::fmt::Write as _;
use std::path::PathBuf;

use clap::Args;
use isogloss_score::{
    report, score_system, BootstrapOptions, Hypotheses, Interval, Reference, ScoreOptions,
    ScoreReport, Summary, TokenRules, VariantMap,
};

use crate::Outcome;

/// Flags of `isogloss score`.
#[derive(Args, Debug)]
pub struct ScoreArgs {
    /// Reference manifest (needs `id`, the transcript column and any `--by` columns).
    #[arg(long = "ref", value_name = "FILE.tsv")]
    pub reference: PathBuf,
    /// Transcript column of the reference to score against.
    #[arg(long, value_name = "NAME")]
    pub column: String,
    /// Hypotheses (`id<TAB>text`).
    #[arg(long = "hyp", value_name = "HYP.tsv")]
    pub hypotheses: PathBuf,
    /// Permissible spelling variants (`variant<TAB>normalized`); adds flexible WER.
    #[arg(long, value_name = "variants.tsv")]
    pub variants: Option<PathBuf>,
    /// Reference columns to break the rates down by, comma-separated (e.g. `dialect,speaker`).
    #[arg(long, value_name = "COLUMNS", value_delimiter = ',')]
    pub by: Vec<String>,
    /// Speaker table (`speaker` plus any columns: age group, sex, locality, recording device…),
    /// joined on the reference's `speaker` column: `--by` may name its columns too.
    #[arg(long, value_name = "FILE.tsv")]
    pub speakers: Option<PathBuf>,
    /// A second system's hypotheses for a paired bootstrap comparison.
    #[arg(long, value_name = "HYP2.tsv")]
    pub compare: Option<PathBuf>,
    /// Seed of the bootstrap's random generator (same seed, same intervals).
    #[arg(long, default_value_t = BootstrapOptions::default().seed)]
    pub seed: u64,
    /// Bootstrap resamples (1 to 1000000).
    #[arg(long, default_value_t = BootstrapOptions::default().resamples,
          value_parser = clap::builder::RangedU64ValueParser::<usize>::new()
              .range(1..=isogloss_score::MAX_RESAMPLES as u64))]
    pub resamples: usize,
    /// Confidence level of the bootstrap intervals, between 0 and 1.
    #[arg(long, default_value_t = BootstrapOptions::default().confidence, value_parser = parse_confidence)]
    pub confidence: f64,
    /// Number of most frequent confusions listed.
    #[arg(long, default_value_t = ScoreOptions::default().top_confusions)]
    pub top_confusions: usize,
    /// Keep upper case (no case folding).
    #[arg(long)]
    pub keep_case: bool,
    /// Keep punctuation attached to words.
    #[arg(long)]
    pub keep_punctuation: bool,
    /// Skip Unicode NFC composition.
    #[arg(long)]
    pub no_nfc: bool,
    /// Print the report as one JSON object instead of Markdown.
    #[arg(long)]
    pub json: bool,
    /// Also write overall and per-group rates as CSV to this file.
    #[arg(long, value_name = "FILE")]
    pub csv: Option<PathBuf>,
    /// Also draw WER and flexible WER with their intervals, overall and per `--by` group, as an
    /// SVG chart into this file.
    #[arg(long, value_name = "FILE.svg")]
    pub chart: Option<PathBuf>,
}

/// Runs `isogloss score`.
pub fn run(args: ScoreArgs) -> anyhow::Result<Outcome> {
    let options = ScoreOptions {
        rules: TokenRules {
            nfc: !args.no_nfc,
            lowercase: !args.keep_case,
            strip_punctuation: !args.keep_punctuation,
        },
        bootstrap: BootstrapOptions {
            resamples: args.resamples,
            seed: args.seed,
            confidence: args.confidence,
        },
        top_confusions: args.top_confusions,
    };
    let reference = match &args.speakers {
        Some(speakers) => {
            Reference::read_with_speakers(&args.reference, &args.column, &args.by, speakers)?
        }
        None => Reference::read(&args.reference, &args.column, &args.by)?,
    };
    let variants = args
        .variants
        .as_deref()
        .map(|path| VariantMap::read(path, &options.rules))
        .transpose()?;
    let hypotheses = Hypotheses::read(&args.hypotheses)?;
    let system = score_system(&reference, &hypotheses, variants.as_ref(), &options.rules)?;
    let second = match &args.compare {
        Some(path) => {
            let hypotheses = Hypotheses::read(path)?;
            Some(score_system(
                &reference,
                &hypotheses,
                variants.as_ref(),
                &options.rules,
            )?)
        }
        None => None,
    };
    let report = report(
        &reference,
        &system,
        second.as_ref(),
        variants.as_ref(),
        &options,
    );

    warn_missing(&report.hypotheses, &report.missing_utterances);
    if let Some(comparison) = &report.comparison {
        warn_missing(&comparison.hypotheses, &comparison.missing_utterances);
    }
    if let Some(path) = &args.csv {
        isogloss_corpus::tsv::write_atomically(path, render_csv(&report).as_bytes())?;
    }
    if let Some(path) = &args.chart {
        let svg = isogloss_score::chart::report_chart(&report).to_svg();
        isogloss_corpus::tsv::write_atomically(path, svg.as_bytes())?;
    }
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", render_markdown(&report));
    }
    Ok(Outcome::Done)
}

fn parse_confidence(text: &str) -> Result<f64, String> {
    match text.parse::<f64>() {
        Ok(confidence) if confidence > 0.0 && confidence < 1.0 => Ok(confidence),
        _ => Err(format!(
            "expected a confidence level between 0 and 1 (e.g. 0.95), found `{text}`"
        )),
    }
}

fn warn_missing(hypotheses: &std::path::Path, missing: &[String]) {
    if missing.is_empty() {
        return;
    }
    const SHOWN: usize = 10;
    let mut list = missing[..missing.len().min(SHOWN)].join(", ");
    if missing.len() > SHOWN {
        let _ = write!(list, " and {} more", missing.len() - SHOWN);
    }
    eprintln!(
        "warning: {}: no hypothesis for {} reference utterance(s), scored as all deletions: {list}",
        hypotheses.display(),
        missing.len()
    );
}

fn percent(rate: Option<f64>) -> String {
    rate.map_or_else(|| "n/a".to_string(), |r| format!("{:.2} %", 100.0 * r))
}

fn interval_text(interval: Option<Interval>) -> String {
    interval.map_or_else(
        || "n/a".to_string(),
        |i| format!("{:.2} – {:.2} %", 100.0 * i.low, 100.0 * i.high),
    )
}

/// Markdown table cells may not contain a bare `|`.
fn cell(text: &str) -> String {
    if text.is_empty() {
        "(empty)".to_string()
    } else {
        text.replace('|', "\\|")
    }
}

fn summary_rows(out: &mut String, summary: &Summary) {
    let plain = &summary.plain;
    let _ = writeln!(
        out,
        "| WER | {} | {} | {} | {} | {} | – | {} |",
        percent(summary.wer),
        interval_text(summary.wer_interval),
        plain.substitutions,
        plain.deletions,
        plain.insertions,
        summary.ref_words
    );
    if let Some(flexible) = &summary.flexible {
        let _ = writeln!(
            out,
            "| flexible WER | {} | {} | {} | {} | {} | {} | {} |",
            percent(summary.flexible_wer),
            interval_text(summary.flexible_wer_interval),
            flexible.substitutions,
            flexible.deletions,
            flexible.insertions,
            flexible.forgiven,
            summary.ref_words
        );
    }
}

/// The report as Markdown, in isogloss's own layout.
pub fn render_markdown(report: &ScoreReport) -> String {
    let level = isogloss_score::chart::level_percent(report.options.bootstrap.confidence);
    let mut out = String::new();
    let _ = writeln!(out, "# Word error rates\n");
    let _ = writeln!(
        out,
        "- reference: `{}`, column `{}`",
        report.reference.display(),
        report.column
    );
    let _ = writeln!(out, "- hypotheses: `{}`", report.hypotheses.display());
    let _ = write!(out, "- utterances: {}", report.overall.utterances);
    if !report.missing_utterances.is_empty() {
        let _ = write!(
            out,
            " ({} without a hypothesis, counted as all deletions)",
            report.missing_utterances.len()
        );
    }
    let _ = writeln!(
        out,
        "\n- intervals: {level} % percentile bootstrap over utterances, {} resamples, seed {}\n",
        report.options.bootstrap.resamples, report.options.bootstrap.seed
    );

    let _ = writeln!(out, "## Overall\n");
    let _ = writeln!(
        out,
        "| rate | value | {level} % interval | substitutions | deletions | insertions | forgiven variants | reference words |"
    );
    let _ = writeln!(out, "|---|---:|---|---:|---:|---:|---:|---:|");
    summary_rows(&mut out, &report.overall);

    let mut columns: Vec<&str> = report.groups.iter().map(|g| g.column.as_str()).collect();
    columns.dedup();
    let flexible = report.overall.flexible.is_some();
    for column in columns {
        let _ = writeln!(out, "\n## By {column}\n");
        let _ = write!(
            out,
            "| {column} | utterances | reference words | WER | {level} % interval |"
        );
        if flexible {
            let _ = write!(out, " flexible WER | {level} % interval |");
        }
        let _ = writeln!(out);
        let _ = writeln!(
            out,
            "|---|---:|---:|---:|---|{}",
            if flexible { "---:|---|" } else { "" }
        );
        for group in report.groups.iter().filter(|g| g.column == column) {
            let summary = &group.summary;
            let _ = write!(
                out,
                "| {} | {} | {} | {} | {} |",
                cell(&group.value),
                summary.utterances,
                summary.ref_words,
                percent(summary.wer),
                interval_text(summary.wer_interval)
            );
            if flexible {
                let _ = write!(
                    out,
                    " {} | {} |",
                    percent(summary.flexible_wer),
                    interval_text(summary.flexible_wer_interval)
                );
            }
            let _ = writeln!(out);
        }
    }

    if !report.confusions.is_empty() {
        let _ = writeln!(out, "\n## Most frequent confusions\n");
        let _ = writeln!(
            out,
            "| reference word | recognized as | count | permissible variant |"
        );
        let _ = writeln!(out, "|---|---|---:|---|");
        for confusion in &report.confusions {
            let _ = writeln!(
                out,
                "| {} | {} | {} | {} |",
                cell(&confusion.reference),
                cell(&confusion.hypothesis),
                confusion.count,
                if confusion.variant { "yes" } else { "no" }
            );
        }
    }

    if let Some(comparison) = &report.comparison {
        let _ = writeln!(
            out,
            "\n## Against `{}` (system 2)\n",
            comparison.hypotheses.display()
        );
        let _ = writeln!(
            out,
            "| rate | system 1 | system 2 | difference (2 − 1), percentage points | {level} % interval of the difference, percentage points | share of resamples where 2 is better |"
        );
        let _ = writeln!(out, "|---|---:|---:|---:|---|---:|");
        let rows = [
            (
                "WER",
                report.overall.wer,
                comparison.overall.wer,
                comparison.wer_difference,
            ),
            (
                "flexible WER",
                report.overall.flexible_wer,
                comparison.overall.flexible_wer,
                comparison.flexible_wer_difference,
            ),
        ];
        for (name, first, second, difference) in rows {
            if first.is_none() && second.is_none() {
                continue;
            }
            let (difference_text, interval, probability) = match difference {
                Some(d) => (
                    format!("{:+.2}", 100.0 * d.difference),
                    format!(
                        "{:+.2} – {:+.2}",
                        100.0 * d.bootstrap.difference_interval.low,
                        100.0 * d.bootstrap.difference_interval.high
                    ),
                    format!("{:.1} %", 100.0 * d.bootstrap.probability_system2_better),
                ),
                None => ("n/a".into(), "n/a".into(), "n/a".into()),
            };
            let _ = writeln!(
                out,
                "| {name} | {} | {} | {difference_text} | {interval} | {probability} |",
                percent(first),
                percent(second)
            );
        }
        if !comparison.missing_utterances.is_empty() {
            let _ = writeln!(
                out,
                "\nSystem 2 has no hypothesis for {} utterance(s), counted as all deletions.",
                comparison.missing_utterances.len()
            );
        }
    }
    out
}

fn csv_field(text: &str) -> String {
    if text.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_string()
    }
}

fn number(value: Option<f64>) -> String {
    value.map_or_else(String::new, |v| format!("{v:.6}"))
}

/// Overall and per-group rates as CSV (RFC 4180 quoting), one row per scope.
pub fn render_csv(report: &ScoreReport) -> String {
    let mut out = String::from(
        "scope,group,utterances,ref_words,substitutions,deletions,insertions,wer,wer_low,wer_high,\
         flexible_substitutions,flexible_deletions,flexible_insertions,forgiven,flexible_wer,\
         flexible_wer_low,flexible_wer_high\n",
    );
    let mut row = |scope: &str, group: &str, s: &Summary| {
        let flexible = s.flexible;
        let count = |f: fn(&isogloss_score::ErrorCounts) -> u64| {
            flexible
                .as_ref()
                .map_or_else(String::new, |c| f(c).to_string())
        };
        let _ = writeln!(
            out,
            "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
            csv_field(scope),
            csv_field(group),
            s.utterances,
            s.ref_words,
            s.plain.substitutions,
            s.plain.deletions,
            s.plain.insertions,
            number(s.wer),
            number(s.wer_interval.map(|i| i.low)),
            number(s.wer_interval.map(|i| i.high)),
            count(|c| c.substitutions),
            count(|c| c.deletions),
            count(|c| c.insertions),
            count(|c| c.forgiven),
            number(s.flexible_wer),
            number(s.flexible_wer_interval.map(|i| i.low)),
            number(s.flexible_wer_interval.map(|i| i.high)),
        );
    };
    row("overall", "", &report.overall);
    for group in &report.groups {
        row(&group.column, &group.value, &group.summary);
    }
    if let Some(comparison) = &report.comparison {
        row("system 2", "", &comparison.overall);
    }
    out
}

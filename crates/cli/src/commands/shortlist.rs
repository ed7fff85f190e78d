//! `isogloss shortlist`: what to transcribe next. Ranks the stretches of a transcript JSON of
//! untranscribed audio for human transcription within a budget of minutes and writes them as a
//! manifest. The ranking lives in `isogloss_confidence::ranking`.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use clap::Args;
use isogloss_confidence::{
    rank_correlation, segment_confidence, shortlist, Calibration, Candidate, RankWeights,
    TrainingProfile,
};
use isogloss_corpus::tsv::write_table;
use isogloss_corpus::{Manifest, Utterance};
use isogloss_decoder::output::TranscriptDocument;
use isogloss_score::{align, tokenize, Reference, TokenRules, VariantMap};

use super::transcripts::resolve_audio;
use crate::Outcome;

/// Flags of `isogloss shortlist`.
#[derive(Args, Debug)]
pub struct ShortlistArgs {
    /// Transcript JSON of the untranscribed audio (`isogloss transcribe --format json`).
    #[arg(value_name = "TRANSCRIPT.json")]
    pub transcript: PathBuf,
    /// Minutes of audio to choose.
    #[arg(long)]
    pub minutes: f64,
    /// The chosen segments as a manifest (highest priority first); the figures of each go to
    /// OUT.ranking.tsv beside it.
    #[arg(long, value_name = "chosen.tsv")]
    pub out: PathBuf,
    /// The manifest that was transcribed: its rows (speaker, dialect, columns) are copied.
    #[arg(long, value_name = "MANIFEST")]
    pub manifest: Option<PathBuf>,
    /// The training manifest: dialects, speakers and words it has little or none of rank higher.
    #[arg(long, value_name = "train.tsv")]
    pub train: Option<PathBuf>,
    /// The writing of the training manifest whose words count as known (and the transcript
    /// column of the written manifest when there is no --manifest).
    #[arg(long, default_value = "text")]
    pub column: String,
    /// Calibration from `isogloss calibrate` (without: raw certainties).
    #[arg(long, value_name = "calibration.toml")]
    pub calibration: Option<PathBuf>,
    /// Folder that the transcript's relative audio paths start from.
    #[arg(long, value_name = "DIR")]
    pub audio_root: Option<PathBuf>,
    /// Weight of the expected share of wrong words.
    #[arg(long, default_value_t = RankWeights::default().errors)]
    pub weight_errors: f64,
    /// Weight of the share of words the training transcripts lack.
    #[arg(long, default_value_t = RankWeights::default().unknown_words)]
    pub weight_unknown: f64,
    /// Weight of the dialect's rarity in training.
    #[arg(long, default_value_t = RankWeights::default().dialect)]
    pub weight_dialect: f64,
    /// Weight of the speaker's rarity in training.
    #[arg(long, default_value_t = RankWeights::default().speaker)]
    pub weight_speaker: f64,
    /// Evaluate the ranking against a reference manifest (for a pool that is in fact
    /// transcribed, like a test split): rank correlation of segment confidence with segment WER,
    /// and the WER of the chosen segments against the whole pool.
    #[arg(long, value_name = "REFERENCE.tsv")]
    pub evaluate: Option<PathBuf>,
}

/// A candidate and where it came from.
struct Source {
    item: usize,
    base: Option<Utterance>,
    audio: PathBuf,
    whole_row: bool,
}

/// Runs `isogloss shortlist`.
pub fn run(args: ShortlistArgs) -> anyhow::Result<Outcome> {
    if !(args.minutes.is_finite() && args.minutes > 0.0) {
        anyhow::bail!(
            "--minutes: expected a positive number, found {}",
            args.minutes
        );
    }
    let weights = RankWeights {
        errors: args.weight_errors,
        unknown_words: args.weight_unknown,
        dialect: args.weight_dialect,
        speaker: args.weight_speaker,
    };
    if [
        weights.errors,
        weights.unknown_words,
        weights.dialect,
        weights.speaker,
    ]
    .iter()
    .any(|w| !(w.is_finite() && *w >= 0.0))
    {
        anyhow::bail!("--weight-*: expected numbers ≥ 0, found {weights:?}");
    }
    let document = TranscriptDocument::read(&args.transcript)?;
    let pool = args.manifest.as_deref().map(Manifest::read).transpose()?;
    let rows: HashMap<&str, &Utterance> = pool
        .iter()
        .flat_map(|m| &m.utterances)
        .map(|u| (u.id.as_str(), u))
        .collect();
    let profile = match &args.train {
        Some(path) => TrainingProfile::from_manifest(&Manifest::read(path)?, Some(&args.column))?,
        None => TrainingProfile::default(),
    };
    let temperature = match &args.calibration {
        Some(path) => Calibration::read(path)?,
        None => Calibration::IDENTITY,
    };

    // Every stretch is a candidate; its times are checked against its audio's length.
    let mut durations: HashMap<PathBuf, Result<f64, String>> = HashMap::new();
    let mut candidates = Vec::new();
    let mut sources = Vec::new();
    let mut bad = Vec::new();
    for (i, item) in document.items.iter().enumerate() {
        let audio = resolve_audio(&args.transcript, args.audio_root.as_deref(), &item.audio);
        let duration = durations
            .entry(audio.clone())
            .or_insert_with(|| {
                isogloss_audio::probe(&audio)
                    .map(|info| info.duration_seconds)
                    .map_err(|e| e.to_string())
            })
            .clone();
        let duration = match duration {
            Ok(d) => d,
            Err(error) => {
                bad.push(format!("item `{}`: {error}", item.id));
                continue;
            }
        };
        let base = rows.get(item.id.as_str()).map(|u| (*u).clone());
        let single = item.segments.len() == 1;
        for (k, stretch) in item.segments.iter().enumerate() {
            let id = if single {
                item.id.clone()
            } else {
                format!("{}-{:03}", item.id, k + 1)
            };
            let reach = stretch
                .words
                .iter()
                .map(|w| w.end)
                .fold(stretch.end, f64::max);
            if reach > duration + isogloss_audio::END_TOLERANCE_SECONDS {
                bad.push(format!(
                    "{}: stretch `{id}` reaches {reach:.3} s, but the audio lasts {duration:.3} s (expected times within the audio: is this the transcript of another recording?)",
                    audio.display()
                ));
                continue;
            }
            let (speaker, dialect) = base
                .as_ref()
                .map(|u| (u.speaker.clone(), u.dialect.clone()))
                .unwrap_or_default();
            candidates.push(Candidate {
                id,
                start: stretch.start,
                end: stretch.end,
                speaker,
                dialect,
                words: stretch.words.iter().map(|w| w.word.clone()).collect(),
                certainties: stretch.words.iter().map(|w| w.confidence).collect(),
            });
            sources.push(Source {
                item: i,
                base: base.clone(),
                audio: audio.clone(),
                whole_row: single && base.is_some(),
            });
        }
    }
    let list = shortlist(
        &candidates,
        &profile,
        &temperature,
        &weights,
        args.minutes * 60.0,
    );
    bad.extend(list.skipped.iter().map(|e| e.to_string()));

    // The manifest of the chosen segments, in the order chosen.
    let columns = pool.as_ref().map_or_else(
        || vec![args.column.clone()],
        |m| m.transcript_columns.clone(),
    );
    let chosen_rows: Vec<Utterance> = list
        .chosen
        .iter()
        .map(|r| {
            let (c, s) = (&candidates[r.index], &sources[r.index]);
            let mut row = s.base.clone().unwrap_or_else(|| Utterance {
                line: 0,
                id: String::new(),
                audio: s.audio.clone(),
                start: None,
                end: None,
                speaker: String::new(),
                dialect: String::new(),
                transcripts: vec![String::new(); columns.len()],
            });
            if !s.whole_row {
                row.id = c.id.clone();
                row.audio = s.audio.clone();
                row.start = Some(c.start);
                row.end = Some(c.end);
            }
            row
        })
        .collect();
    let written = Manifest {
        path: args.out.clone(),
        transcript_columns: columns,
        utterances: Vec::new(),
    };
    written.write_subset(&args.out, &chosen_rows.iter().collect::<Vec<_>>())?;
    let ranking_path = sidecar(&args.out);
    let ranking_rows: Vec<Vec<String>> = list
        .chosen
        .iter()
        .enumerate()
        .map(|(n, r)| {
            let c = &candidates[r.index];
            vec![
                (n + 1).to_string(),
                c.id.clone(),
                format!("{:.3}", (c.end - c.start) / 60.0),
                format!("{:.3}", r.cumulative_seconds / 60.0),
                r.confidence.map_or_else(String::new, |v| format!("{v:.4}")),
                format!("{:.4}", r.unknown_share),
                format!("{:.4}", r.dialect_rarity),
                format!("{:.4}", r.speaker_rarity),
                format!("{:.4}", r.priority),
            ]
        })
        .collect();
    write_table(
        &ranking_path,
        &[
            "rank",
            "id",
            "minutes",
            "cumulative_minutes",
            "confidence",
            "unknown_share",
            "dialect_rarity",
            "speaker_rarity",
            "priority",
        ],
        &ranking_rows,
    )?;
    let chosen_seconds = list.chosen.last().map_or(0.0, |r| r.cumulative_seconds);
    eprintln!(
        "chose {} of {} segments, {:.1} of {:.1} minutes (budget {:.1}), into {} (figures: {})",
        list.chosen.len(),
        candidates.len() - list.skipped.len(),
        chosen_seconds / 60.0,
        list.pool_seconds / 60.0,
        args.minutes,
        args.out.display(),
        ranking_path.display()
    );
    if let Some(reference) = &args.evaluate {
        evaluate(
            reference,
            &args.column,
            &candidates,
            &list.chosen,
            &temperature,
            &document,
            &sources,
        )?;
    }
    if bad.is_empty() {
        return Ok(Outcome::Done);
    }
    eprintln!("{} segments left out:", bad.len());
    for problem in &bad {
        eprintln!("  {problem}");
    }
    Ok(Outcome::SomeItemsFailed)
}

/// `chosen.tsv` → `chosen.ranking.tsv`.
fn sidecar(out: &Path) -> PathBuf {
    let stem = out
        .file_stem()
        .map_or_else(|| "shortlist".into(), |s| s.to_string_lossy().into_owned());
    out.with_file_name(format!("{stem}.ranking.tsv"))
}

/// Prints how well the ranking finds the segments the recognizer gets wrong, for a pool whose
/// reference is known. Only segments that are whole manifest rows have a reference.
fn evaluate(
    reference: &Path,
    column: &str,
    candidates: &[Candidate],
    chosen: &[isogloss_confidence::Ranked],
    temperature: &Calibration,
    document: &TranscriptDocument,
    sources: &[Source],
) -> anyhow::Result<()> {
    let reference = Reference::read(reference, column, &[])?;
    let texts: HashMap<&str, &str> = reference
        .utterances
        .iter()
        .map(|u| (u.id.as_str(), u.text.as_str()))
        .collect();
    let rules = TokenRules::default();
    // (errors, reference words) per candidate, for the candidates that are whole items
    let scored: Vec<Option<(u64, u64)>> = candidates
        .iter()
        .zip(sources)
        .map(|(c, s)| {
            let item = &document.items[s.item];
            if item.segments.len() != 1 {
                return None;
            }
            let text = texts.get(item.id.as_str())?;
            let counts = align(
                &tokenize(text, &rules),
                &tokenize(&c.words.join(" "), &rules),
                &VariantMap::new(),
            )
            .counts();
            (counts.ref_words > 0).then_some((counts.errors(), counts.ref_words))
        })
        .collect();
    let (mut confidence, mut wer) = (Vec::new(), Vec::new());
    for (c, s) in candidates.iter().zip(&scored) {
        if let Some((errors, words)) = s {
            confidence.push(
                segment_confidence(c.certainties.iter().copied(), temperature).unwrap_or(0.0),
            );
            wer.push(*errors as f64 / *words as f64);
        }
    }
    if wer.is_empty() {
        anyhow::bail!(
            "{}: no segment of the transcript is a row of this reference (column `{column}`)",
            reference.path.display()
        );
    }
    let rate = |pairs: &mut dyn Iterator<Item = (u64, u64)>| {
        let (e, w) = pairs.fold((0, 0), |(e, w), (a, b)| (e + a, w + b));
        100.0 * e as f64 / w.max(1) as f64
    };
    let all = rate(&mut scored.iter().flatten().copied());
    let picked = rate(&mut chosen.iter().filter_map(|r| scored[r.index]));
    let picked_count = chosen.iter().filter(|r| scored[r.index].is_some()).count();
    let rho = rank_correlation(&confidence, &wer);
    println!(
        "segments with a reference: {}\nSpearman rank correlation of segment confidence with segment WER: {}\nWER of the whole pool: {all:.1} %\nWER of the {picked_count} chosen segments: {picked:.1} %",
        wer.len(),
        rho.map_or("undefined".to_string(), |r| format!("{r:.3}"))
    );
    Ok(())
}

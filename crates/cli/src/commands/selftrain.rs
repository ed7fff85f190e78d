//! `isogloss train --untranscribed`: rounds of self-training. Wiring only: decoding is
//! `isogloss_batch::transcribe` (as `isogloss transcribe` does it), the threshold rule and the
//! selection are `isogloss_confidence::selftrain`, training is `isogloss_acoustic::pipeline`.
//!
//! The output folder holds one folder per round (docs/training.md, "Self-training"):
//! `round-0/` the starting model (trained first, unless `--from` names one) and its dev
//! transcript; `round-K/` the untranscribed pool decoded by round K−1's model, the round's
//! training manifest (transcribed rows + pseudo-labels), the model it trained, its dev
//! transcript and `round.json` once the round is complete. The last round's model is copied to
//! the folder itself, with every round recorded in its `model.toml`; `training.jsonl` there gets
//! one line per round.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::Context;
use isogloss_acoustic::model::{ModelDescription, SelfTrainingRound};
use isogloss_acoustic::pipeline::TrainOptions;
use isogloss_batch::{batch_items, transcribe, BatchReport, Event, ItemSource, TranscribeSettings};
use isogloss_confidence::{
    choose_threshold, pool_against_dev, pooled_wer, select, DevSegment, PseudoCandidate,
    ThresholdRule,
};
use isogloss_corpus::tsv::{write_atomically, write_table};
use isogloss_corpus::{Manifest, Utterance};
use isogloss_decoder::output::{ItemTranscript, OutputFormat, TimedWord};
use isogloss_decoder::SearchOptions;
use isogloss_score::TokenRules;

use super::train::train_with_progress;
use super::transcribe::{FileAudio, ModelRecognizer};

/// What a self-training run needs besides the ordinary training options.
pub struct SelfTraining {
    /// The untranscribed pool (a manifest; transcript columns, if any, are ignored).
    pub untranscribed: PathBuf,
    /// Rounds to run.
    pub rounds: usize,
    /// How the threshold is chosen.
    pub rule: ThresholdRule,
    /// The model to start from instead of training one first.
    pub from: Option<PathBuf>,
    /// LM of the decoding.
    pub lm: Option<PathBuf>,
    /// Lexicon of the decoding.
    pub lexicon: Option<PathBuf>,
    /// Beam search settings.
    pub search: SearchOptions,
    /// The peak learning rate of every round's training as a share of the configuration's
    /// (round 0, when trained here, uses the configuration's own).
    pub round_rate_share: f64,
}

/// Where round `k` lives.
fn round_dir(out: &Path, k: usize) -> PathBuf {
    out.join(format!("round-{k}"))
}

/// The file that marks round `k` complete, with its record.
fn done_mark(out: &Path, k: usize) -> PathBuf {
    round_dir(out, k).join("round.json")
}

/// Runs the rounds; `base` holds the training options shared by every training (`out`,
/// `resume` and `start_from` are set per round). Returns the rounds' records.
pub fn run(base: &TrainOptions, plan: &SelfTraining) -> anyhow::Result<Vec<SelfTrainingRound>> {
    let out = &base.out;
    if !base.resume && round_dir(out, 0).exists() {
        anyhow::bail!(
            "{}: a self-training run already wrote here; pass --resume to continue it or choose another --out",
            round_dir(out, 0).display()
        );
    }
    std::fs::create_dir_all(round_dir(out, 0))
        .with_context(|| format!("creating {}", round_dir(out, 0).display()))?;
    let labelled = Manifest::read(&base.train_manifest)?;
    let labelled_column = labelled.column_index(&base.column)?;
    let dev = Manifest::read(&base.dev_manifest)?;
    let dev_column = dev.column_index(&base.column)?;
    let pool = Manifest::read_untranscribed(&plan.untranscribed)?;

    // Round 0: the starting model.
    let mut model = match &plan.from {
        Some(dir) => dir.clone(),
        None => {
            let dir = round_dir(out, 0);
            if !done_mark(out, 0).exists() {
                eprintln!("round 0: training on the transcribed data");
                train_round(
                    base,
                    &dir,
                    &base.train_manifest,
                    None,
                    base.config.training.learning_rate,
                )?;
                write_atomically(&done_mark(out, 0), b"{\"round\": 0}\n")?;
            }
            dir
        }
    };
    let mut dev_report = decode(
        plan,
        &model,
        &base.dev_manifest,
        &round_dir(out, 0).join("dev.json"),
    )?;

    let mut records = Vec::new();
    for k in 1..=plan.rounds {
        let dir = round_dir(out, k);
        if done_mark(out, k).exists() {
            let text = std::fs::read_to_string(done_mark(out, k))
                .with_context(|| format!("reading {}", done_mark(out, k).display()))?;
            let record: SelfTrainingRound = serde_json::from_str(&text).with_context(|| {
                format!(
                    "{}: expected the record of a finished round",
                    done_mark(out, k).display()
                )
            })?;
            eprintln!("round {k}: already complete");
            records.push(record);
            model = dir.clone();
            dev_report = decode(plan, &model, &base.dev_manifest, &dir.join("dev.json"))?;
            continue;
        }
        std::fs::create_dir_all(&dir).with_context(|| format!("creating {}", dir.display()))?;

        // 1. The dev segments under the current model choose the threshold.
        let segments = dev_segments(&dev_report, &dev, dev_column);
        let choice = choose_threshold(&segments, &plan.rule);

        // 2. The pool, transcribed by the current model, and what the threshold keeps of it.
        let pool_report = decode(
            plan,
            &model,
            &plan.untranscribed,
            &dir.join("untranscribed.json"),
        )?;
        let candidates: Vec<PseudoCandidate> = pool_report
            .items
            .iter()
            .map(|item| {
                let seconds = item.segments.iter().map(|s| s.end - s.start).sum();
                PseudoCandidate::new(item.id.clone(), seconds, &words_of(item))
            })
            .collect();
        let selection = select(&candidates, choice.threshold);
        let by_id: HashMap<&str, &Utterance> =
            pool.utterances.iter().map(|u| (u.id.as_str(), u)).collect();
        let mut rows: Vec<Vec<String>> = labelled
            .utterances
            .iter()
            .map(|u| manifest_row(u, &u.transcripts[labelled_column]))
            .collect::<anyhow::Result<_>>()?;
        for &i in &selection.kept {
            let item = &pool_report.items[i];
            if let Some(row) = by_id.get(item.id.as_str()) {
                let text: Vec<String> = words_of(item).into_iter().map(|w| w.word).collect();
                rows.push(manifest_row(row, &text.join(" "))?);
            }
        }
        let train_manifest = dir.join("train.tsv");
        write_table(
            &train_manifest,
            &[
                "id",
                "audio",
                "start",
                "end",
                "speaker",
                "dialect",
                &base.column,
            ],
            &rows,
        )?;
        let note = selection.note();
        let learning_rate = base.config.training.learning_rate * plan.round_rate_share;
        let against_dev = pool_against_dev(&segments, &candidates);
        let warning = against_dev.and_then(|a| a.warning());
        let mut record = SelfTrainingRound {
            round: k,
            rule: choice.rule.clone(),
            threshold: choice.threshold,
            offered_segments: selection.offered,
            offered_hours: selection.offered_seconds / 3600.0,
            kept_segments: selection.kept.len(),
            kept_hours: selection.kept_seconds / 3600.0,
            dev_kept_segments: choice.dev_kept,
            dev_kept_wer: choice.dev_kept_wer,
            dev_wer_before: choice.dev_wer,
            dev_wer_after: None,
            train_utterances: rows.len(),
            note: note.clone(),
            dev_median_confidence: against_dev.map(|a| a.dev_median),
            pool_median_confidence: against_dev.map(|a| a.pool_median),
            warning: warning.clone(),
            learning_rate: Some(learning_rate),
        };
        eprintln!(
            "round {k}: threshold {} ({}); kept {} of {} untranscribed segments ({:.2} of {:.2} h); dev WER of the labelling model {}, of the dev segments kept {}",
            choice.threshold.map_or("none".into(), |t| format!("{t:.4}")),
            choice.rule,
            selection.kept.len(),
            selection.offered,
            record.kept_hours,
            record.offered_hours,
            percent(record.dev_wer_before),
            choice
                .dev_kept_wer
                .map_or("none".into(), |w| format!("{:.2} %", 100.0 * w)),
        );
        if let Some(note) = &note {
            eprintln!("round {k}: {note}; this round trains on the transcribed data alone");
        }
        if let Some(warning) = &warning {
            eprintln!("round {k}: warning: {warning}");
        }

        // 3. Train from the current weights on transcribed + pseudo-labelled data (once: a
        // resumed run whose round was trained goes on to its dev transcript).
        let trained = dir.join("trained");
        if !trained.exists() {
            eprintln!(
                "round {k}: training from the previous weights at a peak learning rate of {learning_rate:.3e} ({} × the configuration's)",
                plan.round_rate_share
            );
            train_round(base, &dir, &train_manifest, Some(&model), learning_rate)?;
            write_atomically(&trained, b"")?;
        }
        model = dir.clone();
        dev_report = decode(plan, &model, &base.dev_manifest, &dir.join("dev.json"))?;
        record.dev_wer_after = pooled_wer(&dev_segments(&dev_report, &dev, dev_column));
        eprintln!(
            "round {k}: dev WER {} → {}",
            percent(record.dev_wer_before),
            percent(record.dev_wer_after)
        );
        let json = serde_json::to_string(&record)?;
        append_line(&out.join("training.jsonl"), &round_line(&record)?)?;
        write_atomically(&done_mark(out, k), format!("{json}\n").as_bytes())?;
        records.push(record);
    }
    finish(out, &model, &records)?;
    Ok(records)
}

/// A WER as a percentage, or "none".
fn percent(wer: Option<f64>) -> String {
    wer.map_or("none".into(), |w| format!("{:.2} %", 100.0 * w))
}

/// The dev segments of a transcript, with their references from the dev manifest (items
/// without a row are left out).
fn dev_segments(report: &BatchReport, dev: &Manifest, column: usize) -> Vec<DevSegment> {
    let rows: HashMap<&str, &Utterance> =
        dev.utterances.iter().map(|u| (u.id.as_str(), u)).collect();
    report
        .items
        .iter()
        .filter_map(|item| {
            let row = rows.get(item.id.as_str())?;
            Some(DevSegment::new(
                &row.transcripts[column],
                &words_of(item),
                &TokenRules::default(),
            ))
        })
        .collect()
}

/// Every word of an item's stretches, in order.
fn words_of(item: &ItemTranscript) -> Vec<TimedWord> {
    item.segments
        .iter()
        .flat_map(|s| s.words.iter().cloned())
        .collect()
}

/// A row of a round's training manifest: the utterance with its audio as an absolute path
/// (the manifest lives in another folder) and `text` as its one transcript column.
fn manifest_row(u: &Utterance, text: &str) -> anyhow::Result<Vec<String>> {
    let audio = std::path::absolute(&u.audio)
        .with_context(|| format!("resolving {}", u.audio.display()))?;
    let time = |t: Option<f64>| t.map_or(String::new(), |t| t.to_string());
    Ok(vec![
        u.id.clone(),
        audio.display().to_string(),
        time(u.start),
        time(u.end),
        u.speaker.clone(),
        u.dialect.clone(),
        text.to_string(),
    ])
}

/// One training of a round into `dir`: resumed when a checkpoint is there, else started (from
/// `from`'s weights when given), at the peak learning rate `learning_rate`.
fn train_round(
    base: &TrainOptions,
    dir: &Path,
    manifest: &Path,
    from: Option<&Path>,
    learning_rate: f64,
) -> anyhow::Result<()> {
    let mut config = base.config.clone();
    config.training.learning_rate = learning_rate;
    let options = TrainOptions {
        config,
        train_manifest: manifest.to_path_buf(),
        out: dir.to_path_buf(),
        resume: isogloss_acoustic::train::checkpoint_path(dir).exists(),
        start_from: from.map(Path::to_path_buf),
        ..base.clone()
    };
    let summary = train_with_progress(&options)
        .with_context(|| format!("training into {}", dir.display()))?;
    for failure in &summary.failed_utterances {
        eprintln!("warning: not used: {failure}");
    }
    Ok(())
}

/// Transcribes a manifest with a model into `out` (transcript JSON), as `isogloss transcribe`
/// would, resuming from its journal; failed items are listed and left out.
fn decode(
    plan: &SelfTraining,
    model: &Path,
    manifest: &Path,
    out: &Path,
) -> anyhow::Result<BatchReport> {
    let items = batch_items(&ItemSource::Manifest(manifest.to_path_buf()), None)?;
    let recognizer = ModelRecognizer::load(model)?;
    let settings = TranscribeSettings {
        lm: plan.lm.clone(),
        lexicon: plan.lexicon.clone(),
        search: plan.search.clone(),
        greedy: false,
        max_segment_seconds: 30.0,
        out: out.to_path_buf(),
        format: OutputFormat::Json,
        resume: true,
    };
    let report = transcribe(
        &settings,
        &items,
        &recognizer,
        &FileAudio,
        &mut |event| match event {
            Event::Warning(message) => eprintln!("warning: {message}"),
            Event::Progress(_) => {}
        },
    )?;
    eprintln!(
        "transcribed {} with {}: {} items ({} from the journal) into {}",
        manifest.display(),
        model.display(),
        report.items.len(),
        report.resumed,
        out.display()
    );
    for (id, error) in &report.failed {
        eprintln!("warning: left out: {id}: {error}");
    }
    Ok(report)
}

fn round_line(record: &SelfTrainingRound) -> anyhow::Result<String> {
    let mut value = serde_json::to_value(record)?;
    value["event"] = "self_training_round".into();
    Ok(value.to_string())
}

fn append_line(path: &Path, line: &str) -> anyhow::Result<()> {
    use std::io::Write;
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .with_context(|| format!("opening {}", path.display()))?;
    writeln!(file, "{line}").with_context(|| format!("writing {}", path.display()))
}

/// Copies the last model into `out` with every round in its `model.toml`.
fn finish(out: &Path, model: &Path, records: &[SelfTrainingRound]) -> anyhow::Result<()> {
    let source = model.join("model.toml");
    let text = std::fs::read_to_string(&source)
        .with_context(|| format!("reading {}", source.display()))?;
    let mut description: ModelDescription = toml::from_str(&text)
        .with_context(|| format!("{}: not a model description", source.display()))?;
    description.self_training = records.to_vec();
    let weights = std::fs::read(model.join("model.safetensors"))
        .with_context(|| format!("reading {}", model.join("model.safetensors").display()))?;
    write_atomically(&out.join("model.safetensors"), &weights)?;
    write_atomically(
        &out.join("model.toml"),
        toml::to_string_pretty(&description)?.as_bytes(),
    )?;
    Ok(())
}

//! `isogloss demo`: the whole job on the committed demo data, in one command.
//!
//! It checks the corpus, builds an in-domain and a mixed (in-domain + out-of-domain) trigram LM,
//! transcribes the test split with the shipped model (greedy, then with each LM and the grapheme
//! lexicon), scores WER and flexible WER per dialect with bootstrap intervals, does the same for
//! each condition of the `cross` split (unseen voices, clean and through reverberation, noise, a
//! telephone line and a lossy codec: one table row per condition), transcribes one
//! long interview recording to WebVTT, and writes a report folder. `--train` first retrains a
//! small model from scratch and uses it instead of the shipped one.
//!
//! The flow is a small sweep (the sweep crate does the LMs, the posterior cache, the decoding and
//! the scoring) plus the greedy baseline and the interview; nothing here is demo-specific logic
//! that a user could not reproduce with `corpus check`, `lm build`, `transcribe` and `score`.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context};
use clap::Args;
use isogloss_acoustic::config::ModelConfig;
use isogloss_acoustic::pipeline::TrainOptions;
use isogloss_acoustic::AcousticModel;
use isogloss_chart::{BarChart, Section};
use isogloss_corpus::check::{check_manifests, AudioCheck};
use isogloss_corpus::tsv::write_atomically;
use isogloss_corpus::Manifest;
use isogloss_decoder::{Decoder, GreedyDecoder, SearchGraph};
use isogloss_lm::Smoothing;
use isogloss_score::chart::{error_rate_series, glossary, level_percent, summary_row};
use isogloss_score::{
    report, score_system, BootstrapOptions, Hypotheses, Reference, ScoreOptions, Summary,
    VariantMap,
};
use isogloss_sweep::config::{Baseline, DecoderGrid, Tuning};
use isogloss_sweep::posteriors::{model_key, posteriors};
use isogloss_sweep::resources::{build_lexicon, build_lm, lm_words};
use isogloss_sweep::{run as sweep_run, LexiconChoice, LexiconKind, LmChoice, Sweep, SweepEvent};

use super::transcribe::{FormatArg, TranscribeArgs};
use crate::Outcome;

/// Decoder settings of the demo: the decoder's defaults (the LM weight and word bonus tuned on
/// this demo's dev split, see [`isogloss_decoder::DEFAULT_LM_WEIGHT`]; the beam as wide as the
/// speed goal allows, see [`isogloss_decoder::DEFAULT_BEAM`]).
const BEAM: usize = isogloss_decoder::DEFAULT_BEAM;
const LM_WEIGHT: f32 = isogloss_decoder::DEFAULT_LM_WEIGHT;
const WORD_BONUS: f32 = isogloss_decoder::DEFAULT_WORD_BONUS;
/// Bootstrap resamples, seed and confidence level of the intervals.
const RESAMPLES: usize = 1000;
const SEED: u64 = 1;
const CONFIDENCE: f64 = 0.95;

/// Run the whole job on the shipped demo data and model: check, build LMs, transcribe, score.
#[derive(Args)]
pub struct DemoArgs {
    /// The demo corpus folder (train/dev/test manifests, their texts, the out-of-domain text
    /// ood.txt, interviews).
    #[arg(long, default_value = "tests/data/demo")]
    data: PathBuf,
    /// The model directory to transcribe with (ignored with --train).
    #[arg(long, default_value = "models/demo")]
    model: PathBuf,
    /// Spelling-variant map of the dialectal writing, for the flexible WER.
    #[arg(long, default_value = "models/demo-variants.tsv")]
    variants: PathBuf,
    /// Report folder (created; earlier results in it are reused where nothing changed).
    #[arg(long, default_value = "demo-report")]
    out: PathBuf,
    /// Retrain a small model from scratch first and use it (a quarter of an hour or more on two
    /// cores with the current recipe and 50 minutes of speech, see the README).
    #[arg(long)]
    train: bool,
    /// Architecture and training settings for --train.
    #[arg(long, default_value = "configs/tdnn-small.toml")]
    config: PathBuf,
    /// Epochs for --train.
    #[arg(long, default_value_t = 25)]
    epochs: usize,
    /// The long recording transcribed to WebVTT (relative to --data).
    #[arg(long, default_value = "interviews/interview1.ogg")]
    interview: PathBuf,
}

/// The conditions of the demo's condition table: label, manifest (relative to the data folder),
/// what it tests. The first is the test split itself; the others are the `cross` split, whose
/// voice configurations no training speaker has, clean and through four archive-like channels.
const CONDITIONS: [(&str, &str, &str); 6] = [
    (
        "clean, unseen speakers",
        "test.tsv",
        "speakers not in train, voices of the kinds heard in train",
    ),
    (
        "unseen voices",
        "cross-clean.tsv",
        "voice configurations and a synthesizer never heard in train",
    ),
    (
        "reverberant",
        "cross-reverb.tsv",
        "the unseen voices in simulated rooms",
    ),
    (
        "noisy",
        "cross-noise.tsv",
        "the unseen voices with noise at 5-20 dB SNR",
    ),
    (
        "telephone",
        "cross-phone.tsv",
        "the unseen voices through a 300-3400 Hz line",
    ),
    (
        "lossy codec",
        "cross-codec.tsv",
        "the unseen voices through a low-bit-rate MP3",
    ),
];

/// One row of the condition table: greedy and LM + lexicon figures on one manifest.
struct ConditionRow {
    label: &'static str,
    what: &'static str,
    greedy: Summary,
    with_lm: Summary,
}

/// One decoded system of the demo: its name and per-dialect figures.
struct System {
    name: String,
    overall: Summary,
    groups: Vec<(String, Summary)>,
    perplexity: Option<f64>,
    oov_rate: Option<f64>,
    /// Out-of-domain mixture weight of the LM, when it mixes.
    out_of_domain_weight: Option<f64>,
    versus_greedy: Option<f64>,
}

fn step(number: usize, text: &str) {
    eprintln!("\n[{number}/7] {text}");
}

fn need(path: &Path, what: &str) -> anyhow::Result<()> {
    if !path.exists() {
        bail!(
            "{}: {what} not found (run `isogloss demo` from the repository root, or pass the path)",
            path.display()
        );
    }
    Ok(())
}

/// Runs `isogloss demo`.
pub fn run(args: DemoArgs) -> anyhow::Result<Outcome> {
    let started = Instant::now();
    let data = &args.data;
    let manifests: Vec<PathBuf> = ["train.tsv", "dev.tsv", "test.tsv"]
        .iter()
        .map(|name| data.join(name))
        .collect();
    for path in &manifests {
        need(path, "demo manifest")?;
    }
    for name in ["train.dialectal.txt", "dev.dialectal.txt", "ood.txt"] {
        need(&data.join(name), "demo text")?;
    }
    need(&args.variants, "variant map")?;
    let interview = data.join(&args.interview);
    need(&interview, "interview recording")?;
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("creating {}", args.out.display()))?;
    let out = &args.out;

    // 1. The corpus.
    step(1, "checking the corpus");
    let check = check_manifests(&manifests, AudioCheck::Decode, &mut |_, _| {});
    for manifest in &check.manifests {
        eprintln!(
            "  {}: {} utterances, {:.1} min, {} speakers",
            manifest.path.display(),
            manifest.utterances,
            manifest.hours * 60.0,
            manifest.speakers
        );
    }
    if check.errors > 0 {
        for problem in check.problems.iter().take(20) {
            eprintln!("  {problem}");
        }
        bail!(
            "the demo corpus has {} error(s); `isogloss corpus check` lists them all",
            check.errors
        );
    }
    eprintln!(
        "  {} errors, {} warnings, {} speakers shared between splits",
        check.errors,
        check.warnings,
        check.shared_speakers.len()
    );

    // 2. The model: shipped, or retrained now.
    let model_dir = if args.train {
        step(2, "training a small model from scratch (--train)");
        let model_dir = out.join("model");
        let options = TrainOptions {
            train_manifest: manifests[0].clone(),
            dev_manifest: manifests[1].clone(),
            column: "dialectal".into(),
            out: model_dir.clone(),
            config: ModelConfig::read(&args.config)?,
            epochs: Some(args.epochs),
            minutes: None,
            resume: model_dir.join("checkpoint.safetensors").exists(),
            seed: SEED,
            lexicon: None,
            start_from: None,
            prefetch: true,
        };
        super::train::keep_freed_memory();
        super::train::train_with_progress(&options)
            .with_context(|| format!("training into {}", model_dir.display()))?;
        eprintln!(
            "  training curve: {}",
            model_dir.join(isogloss_acoustic::log::CURVE_FILE).display()
        );
        model_dir
    } else {
        step(2, "using the shipped model");
        need(&args.model.join("model.toml"), "model")?;
        eprintln!("  {}", args.model.display());
        args.model.clone()
    };

    // 3–4. LMs, lexicon, posteriors and the LM cells: a two-cell sweep.
    step(
        3,
        "building the language models and transcribing the test split",
    );
    let lms = vec![
        LmChoice::Build {
            name: "in-domain 3-gram".into(),
            order: 3,
            smoothing: Smoothing::ModifiedKneserNey,
            text: vec![data.join("train.{column}.txt")],
            out_of_domain: None,
            out_of_domain_weight: None,
        },
        LmChoice::Build {
            name: "in-domain + out-of-domain 3-gram".into(),
            order: 3,
            smoothing: Smoothing::ModifiedKneserNey,
            text: vec![data.join("train.{column}.txt")],
            out_of_domain: Some(data.join("ood.txt")),
            out_of_domain_weight: None,
        },
    ];
    let lexicon_choice = LexiconChoice {
        name: "grapheme".into(),
        kind: LexiconKind::Grapheme,
    };
    let sweep = Sweep {
        path: out.join("(demo)"),
        out_dir: out.clone(),
        models: vec![model_dir.clone()],
        test: manifests[2].clone(),
        dev: Some(manifests[1].clone()),
        columns: vec!["dialectal".into()],
        variants: BTreeMap::from([("dialectal".to_string(), args.variants.clone())]),
        group_by: "dialect".into(),
        seed: SEED,
        resamples: RESAMPLES,
        confidence: CONFIDENCE,
        lms: lms.clone(),
        lexicons: vec![lexicon_choice.clone()],
        decoder: DecoderGrid {
            beams: vec![BEAM],
            lm_weights: vec![LM_WEIGHT],
            word_bonuses: vec![WORD_BONUS],
            tuning: Tuning::None,
        },
        baseline: Baseline {
            model: 0,
            column: 0,
            lm: 0,
            lexicon: 0,
        },
    };
    let results = sweep_run::run(&sweep, &|event| match event {
        SweepEvent::AcousticPass {
            computed, seconds, ..
        } => eprintln!(
            "  acoustic model: {computed} utterances in {seconds:.1} s (the rest from the cache)"
        ),
        SweepEvent::Note(note) => eprintln!("  note: {note}"),
        _ => {}
    })?;

    // The LMs and the lexicon as files, for the interview and for the user to reuse.
    let dev_manifest = Manifest::read(&manifests[1])?;
    let dev_column = dev_manifest.column_index("dialectal")?;
    let dev_sentences: Vec<Vec<String>> = dev_manifest
        .utterances
        .iter()
        .map(|u| {
            u.transcripts[dev_column]
                .split_whitespace()
                .map(str::to_string)
                .collect()
        })
        .collect();
    let lm_dir = out.join("lm");
    std::fs::create_dir_all(&lm_dir).with_context(|| format!("creating {}", lm_dir.display()))?;
    let mut lm_files = Vec::new();
    let mut out_of_domain_weights = Vec::new();
    for (choice, file) in lms.iter().zip(["indomain-3gram.arpa", "mixed-3gram.arpa"]) {
        let built = build_lm(
            choice,
            "dialectal",
            Some(&dev_sentences),
            &out.join("cache").join("lms"),
        )?;
        let target = lm_dir.join(file);
        std::fs::copy(&built.path, &target)
            .with_context(|| format!("copying {} to {}", built.path.display(), target.display()))?;
        if let Some(weight) = built.out_of_domain_weight {
            eprintln!("  {}: out-of-domain weight {weight:.3} (EM on dev)", file);
        }
        out_of_domain_weights.push(built.out_of_domain_weight);
        lm_files.push((target, built.model));
    }
    let lexicon = build_lexicon(&lexicon_choice, &lm_words(&lm_files[0].1))?;
    let lexicon_path = out.join("lexicon-grapheme.tsv");
    lexicon.lexicon.write(&lexicon_path)?;

    // The greedy baseline from the cached posteriors.
    let model = AcousticModel::load(&model_dir)?;
    let test_manifest = Manifest::read(&manifests[2])?;
    let pass = posteriors(
        &model,
        &model_key(&model_dir)?,
        &test_manifest,
        &out.join("cache").join("posteriors"),
    )?;
    let graph = SearchGraph::lexicon_free(model.units().to_vec())?;
    let mut greedy = GreedyDecoder::new(&graph);
    let mut rows = Vec::new();
    for utterance in &test_manifest.utterances {
        // Greedy decoding keeps the most confident reading, the first.
        if let Some(p) = pass.by_id.get(&utterance.id).and_then(|r| r.first()) {
            rows.push(vec![utterance.id.clone(), greedy.decode(p.view())?.text()]);
        }
    }
    let greedy_path = out.join("hyp-greedy.tsv");
    isogloss_corpus::tsv::write_table(&greedy_path, &["id", "text"], &rows)?;

    // 5. Scores.
    step(4, "scoring WER and flexible WER per dialect");
    let options = ScoreOptions {
        bootstrap: BootstrapOptions {
            resamples: RESAMPLES,
            seed: SEED,
            confidence: CONFIDENCE,
        },
        ..ScoreOptions::default()
    };
    let reference = Reference::read(&manifests[2], "dialectal", &["dialect".to_string()])?;
    let variants = VariantMap::read(&args.variants, &options.rules)?;
    let greedy_system = score_system(
        &reference,
        &Hypotheses::read(&greedy_path)?,
        Some(&variants),
        &options.rules,
    )?;
    let greedy_report = report(&reference, &greedy_system, None, Some(&variants), &options);
    let mut systems = vec![System {
        name: "greedy (no LM, no lexicon)".into(),
        overall: greedy_report.overall,
        groups: greedy_report
            .groups
            .into_iter()
            .map(|g| (g.value, g.summary))
            .collect(),
        perplexity: None,
        oov_rate: None,
        out_of_domain_weight: None,
        versus_greedy: None,
    }];
    let greedy_wer = systems[0].overall.wer;
    for (index, cell) in results.cells.iter().enumerate() {
        systems.push(System {
            name: format!("{} + grapheme lexicon", cell.lm),
            overall: cell.overall.clone(),
            groups: cell.groups.clone(),
            perplexity: Some(cell.perplexity),
            oov_rate: Some(cell.oov_rate),
            out_of_domain_weight: out_of_domain_weights.get(index).copied().flatten(),
            versus_greedy: cell.overall.wer.zip(greedy_wer).map(|(a, b)| a - b),
        });
    }
    // Copy each cell's hypotheses next to the report under a readable name.
    for (cell, name) in results
        .cells
        .iter()
        .zip(["hyp-indomain.tsv", "hyp-mixed.tsv"])
    {
        let target = out.join(name);
        std::fs::copy(&cell.hypotheses, &target).with_context(|| {
            format!(
                "copying {} to {}",
                cell.hypotheses.display(),
                target.display()
            )
        })?;
    }

    // The condition table: the test split and each cross condition, greedy and with the
    // in-domain LM and the lexicon (the same decoder settings as above).
    step(
        5,
        "transcribing unseen voices and degraded channels (the cross split)",
    );
    let mut conditions = Vec::new();
    let cross_dir = out.join("cross");
    std::fs::create_dir_all(&cross_dir)
        .with_context(|| format!("creating {}", cross_dir.display()))?;
    for (index, (label, file, what)) in CONDITIONS.iter().enumerate() {
        let manifest = data.join(file);
        if index == 0 {
            conditions.push(ConditionRow {
                label,
                what,
                greedy: systems[0].overall.clone(),
                with_lm: systems[1].overall.clone(),
            });
            continue;
        }
        if !manifest.exists() {
            eprintln!("  {}: not found, condition left out", manifest.display());
            continue;
        }
        let stem = file.trim_end_matches(".tsv");
        let greedy = greedy_summary(
            &model,
            &model_dir,
            &manifest,
            &out.join("cache").join("posteriors"),
            &cross_dir.join(format!("hyp-{stem}-greedy.tsv")),
            &variants,
            &options,
        )?;
        let condition_sweep = Sweep {
            test: manifest.clone(),
            dev: None,
            lms: vec![lms[0].clone()],
            ..sweep.clone()
        };
        let condition_results = sweep_run::run(&condition_sweep, &|_| {})?;
        let cell = condition_results
            .cells
            .first()
            .with_context(|| format!("{}: no result from the decoder", manifest.display()))?;
        let target = cross_dir.join(format!("hyp-{stem}-indomain.tsv"));
        std::fs::copy(&cell.hypotheses, &target).with_context(|| {
            format!(
                "copying {} to {}",
                cell.hypotheses.display(),
                target.display()
            )
        })?;
        eprintln!(
            "  {label}: greedy WER {} %, with LM and lexicon {} %",
            percent(greedy.wer),
            percent(cell.overall.wer)
        );
        conditions.push(ConditionRow {
            label,
            what,
            greedy,
            with_lm: cell.overall.clone(),
        });
    }

    // 6. The interview.
    step(6, "transcribing a long interview recording to WebVTT");
    let vtt = out.join(format!(
        "{}.vtt",
        interview
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "interview".into())
    ));
    let transcribe = TranscribeArgs {
        model: model_dir.clone(),
        lm: Some(lm_files[0].0.clone()),
        lexicon: Some(lexicon_path.clone()),
        manifest: None,
        audio: vec![interview.clone()],
        out: vtt.clone(),
        format: FormatArg::Vtt,
        beam: BEAM,
        lm_weight: LM_WEIGHT,
        word_bonus: WORD_BONUS,
        unit_margin: 8.0,
        skip_blank_above: 0.999,
        no_lookahead: false,
        greedy: false,
        max_segment: 30.0,
        resume: false,
        shard: None,
    };
    let interview_started = Instant::now();
    let interview_seconds = isogloss_audio::probe(&interview)
        .map(|info| info.duration_seconds)
        .unwrap_or(0.0);
    if let Outcome::SomeItemsFailed = super::transcribe::run(transcribe)? {
        bail!(
            "{}: the interview could not be transcribed",
            interview.display()
        );
    }
    eprintln!(
        "  {} ({:.1} min of audio in {:.1} s)",
        vtt.display(),
        interview_seconds / 60.0,
        interview_started.elapsed().as_secs_f64()
    );

    // 7. The report.
    step(7, "writing the report");
    let chosen = systems
        .iter()
        .skip(1)
        .min_by(|a, b| {
            a.overall
                .wer
                .unwrap_or(f64::INFINITY)
                .total_cmp(&b.overall.wer.unwrap_or(f64::INFINITY))
        })
        .unwrap_or(&systems[0]);
    write_atomically(
        &out.join("chart.svg"),
        dialect_chart(chosen, results.audio_seconds).as_bytes(),
    )?;
    let mut markdown = render_markdown(&systems, chosen, &results.audio_seconds, &vtt);
    markdown.push_str(&render_conditions(&conditions, &systems[1].name));
    write_atomically(&out.join("results.md"), markdown.as_bytes())?;
    write_atomically(&out.join("results.csv"), render_csv(&systems).as_bytes())?;
    write_atomically(
        &out.join("conditions.csv"),
        render_conditions_csv(&conditions).as_bytes(),
    )?;
    println!("{}", render_table(&systems, chosen));
    println!("{}", render_condition_table(&conditions));
    eprintln!(
        "report: {} (results.md, results.csv, conditions.csv, chart.svg, {}{}), {:.0} s in all",
        out.display(),
        vtt.file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default(),
        if args.train {
            ", model/ with its training-curve.svg"
        } else {
            ""
        },
        started.elapsed().as_secs_f64()
    );
    Ok(Outcome::Done)
}

/// Greedy hypotheses (no LM, no lexicon) of every utterance of `manifest_path` from the cached
/// posteriors, written to `hyp_path` and scored against its dialectal writing.
fn greedy_summary(
    model: &AcousticModel,
    model_dir: &Path,
    manifest_path: &Path,
    cache: &Path,
    hyp_path: &Path,
    variants: &VariantMap,
    options: &ScoreOptions,
) -> anyhow::Result<Summary> {
    let manifest = Manifest::read(manifest_path)?;
    let pass = posteriors(model, &model_key(model_dir)?, &manifest, cache)?;
    let graph = SearchGraph::lexicon_free(model.units().to_vec())?;
    let mut greedy = GreedyDecoder::new(&graph);
    let mut rows = Vec::new();
    for utterance in &manifest.utterances {
        // Greedy decoding keeps the most confident reading, the first.
        if let Some(p) = pass.by_id.get(&utterance.id).and_then(|r| r.first()) {
            rows.push(vec![utterance.id.clone(), greedy.decode(p.view())?.text()]);
        }
    }
    isogloss_corpus::tsv::write_table(hyp_path, &["id", "text"], &rows)?;
    let reference = Reference::read(manifest_path, "dialectal", &["dialect".to_string()])?;
    let system = score_system(
        &reference,
        &Hypotheses::read(hyp_path)?,
        Some(variants),
        &options.rules,
    )?;
    Ok(report(&reference, &system, None, Some(variants), options).overall)
}

/// The chosen system's WER and flexible WER per dialect and over all dialects, with their
/// intervals, as SVG.
fn dialect_chart(chosen: &System, audio_seconds: f64) -> String {
    BarChart {
        title: format!("WER and flexible WER per dialect: {}", chosen.name),
        notes: vec![format!(
            "Demo test split, dialectal writing: {} utterances, {} words, {:.1} min of speakers not heard in training. Flexible WER counts a permissible spelling variant as correct.",
            chosen.overall.utterances,
            chosen.overall.ref_words,
            audio_seconds / 60.0
        )],
        axis: "error rate, %".into(),
        series: error_rate_series(),
        glossary: glossary(CONFIDENCE, "the reference"),
        sections: vec![
            Section {
                heading: None,
                rows: chosen
                    .groups
                    .iter()
                    .map(|(dialect, summary)| summary_row(dialect, summary, None, None))
                    .collect(),
            },
            Section {
                heading: None,
                rows: vec![summary_row("all dialects", &chosen.overall, None, None)],
            },
        ],
    }
    .to_svg()
}

fn percent(rate: Option<f64>) -> String {
    rate.map_or_else(|| "–".into(), |r| format!("{:.1}", 100.0 * r))
}

fn with_interval(rate: Option<f64>, interval: Option<isogloss_score::Interval>) -> String {
    match interval {
        Some(i) => format!(
            "{} [{:.1}, {:.1}]",
            percent(rate),
            100.0 * i.low,
            100.0 * i.high
        ),
        None => percent(rate),
    }
}

/// The short table printed at the end: one row per dialect, the greedy WER beside the chosen
/// system's WER and flexible WER.
fn render_table(systems: &[System], chosen: &System) -> String {
    let greedy = &systems[0];
    let mut text = String::new();
    let _ = writeln!(
        text,
        "Demo test split, dialectal writing: WER and flexible WER in % ({}% bootstrap interval)\nsystem: {}\n",
        level_percent(CONFIDENCE),
        chosen.name
    );
    let _ = writeln!(
        text,
        "{:<14} {:>6} {:>10} {:>20} {:>20}",
        "dialect", "words", "greedy WER", "WER", "flexible WER"
    );
    let mut rows: Vec<(String, &Summary, Option<&Summary>)> = chosen
        .groups
        .iter()
        .map(|(dialect, s)| {
            let g = greedy
                .groups
                .iter()
                .find(|(d, _)| d == dialect)
                .map(|(_, s)| s);
            (dialect.clone(), s, g)
        })
        .collect();
    rows.push(("all".into(), &chosen.overall, Some(&greedy.overall)));
    for (dialect, summary, greedy) in rows {
        let _ = writeln!(
            text,
            "{:<14} {:>6} {:>10} {:>20} {:>20}",
            dialect,
            summary.ref_words,
            percent(greedy.and_then(|g| g.wer)),
            with_interval(summary.wer, summary.wer_interval),
            with_interval(summary.flexible_wer, summary.flexible_wer_interval)
        );
    }
    text
}

fn render_markdown(systems: &[System], chosen: &System, audio_seconds: &f64, vtt: &Path) -> String {
    let mut text = String::new();
    let _ = writeln!(text, "# isogloss demo report\n");
    let _ = writeln!(
        text,
        "Test split of the demo corpus ({:.1} min of audio), dialectal writing. WER and flexible WER (spelling variants of the variant map count as correct) in %, with {}% bootstrap intervals over utterances. Automatic transcripts: review before quoting.\n",
        audio_seconds / 60.0,
        level_percent(CONFIDENCE)
    );
    let _ = writeln!(text, "## Systems\n");
    let _ = writeln!(
        text,
        "| system | out-of-domain weight | perplexity | OOV % | WER | flexible WER | WER change vs greedy |"
    );
    let _ = writeln!(text, "|---|---:|---:|---:|---|---|---:|");
    for system in systems {
        let _ = writeln!(
            text,
            "| {} | {} | {} | {} | {} | {} | {} |",
            system.name,
            system
                .out_of_domain_weight
                .map_or_else(|| "–".into(), |w| format!("{w:.3}")),
            system
                .perplexity
                .map_or_else(|| "–".into(), |p| format!("{p:.1}")),
            system
                .oov_rate
                .map_or_else(|| "–".into(), |r| format!("{:.1}", 100.0 * r)),
            with_interval(system.overall.wer, system.overall.wer_interval),
            with_interval(
                system.overall.flexible_wer,
                system.overall.flexible_wer_interval
            ),
            system
                .versus_greedy
                .map_or_else(|| "–".into(), |d| format!("{:+.1} points", 100.0 * d)),
        );
    }
    let _ = writeln!(
        text,
        "\nThe out-of-domain weight is estimated by EM on the dev transcripts; a weight near 0 means the out-of-domain text does not help predict them (it is in standard spelling, the test writing is dialectal).\n"
    );
    let _ = writeln!(text, "## Per dialect: {}\n", chosen.name);
    let _ = writeln!(
        text,
        "| dialect | utterances | words | WER | flexible WER |"
    );
    let _ = writeln!(text, "|---|---:|---:|---|---|");
    for (dialect, s) in chosen
        .groups
        .iter()
        .map(|(d, s)| (d.as_str(), s))
        .chain(std::iter::once(("all", &chosen.overall)))
    {
        let _ = writeln!(
            text,
            "| {} | {} | {} | {} | {} |",
            dialect,
            s.utterances,
            s.ref_words,
            with_interval(s.wer, s.wer_interval),
            with_interval(s.flexible_wer, s.flexible_wer_interval)
        );
    }
    let _ = writeln!(
        text,
        "\nChart: `chart.svg` (whiskers: the {}% intervals). The interview transcript: `{}`. Hypotheses: `hyp-*.tsv`; the LMs: `lm/`; the lexicon: `lexicon-grapheme.tsv`.",
        level_percent(CONFIDENCE),
        vtt.file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default()
    );
    text
}

/// The condition table in the report: greedy and LM + lexicon figures per condition.
fn render_conditions(rows: &[ConditionRow], system: &str) -> String {
    let mut text = String::new();
    let _ = writeln!(
        text,
        "\n## Unseen voices and channels\n\nGreedy (no LM, no lexicon) and {system}; dialectal writing, WER and flexible WER in % with 95% bootstrap intervals. The cross conditions are the same utterances, clean and through each channel.\n"
    );
    let _ = writeln!(
        text,
        "| condition | what it tests | utterances | greedy WER | WER | flexible WER |"
    );
    let _ = writeln!(text, "|---|---|---:|---|---|---|");
    for row in rows {
        let _ = writeln!(
            text,
            "| {} | {} | {} | {} | {} | {} |",
            row.label,
            row.what,
            row.with_lm.utterances,
            with_interval(row.greedy.wer, row.greedy.wer_interval),
            with_interval(row.with_lm.wer, row.with_lm.wer_interval),
            with_interval(row.with_lm.flexible_wer, row.with_lm.flexible_wer_interval)
        );
    }
    text
}

/// One row per condition: greedy WER, then WER and flexible WER with LM and lexicon.
fn render_conditions_csv(rows: &[ConditionRow]) -> String {
    let mut text = String::from(
        "condition,utterances,ref_words,greedy_wer,wer,wer_low,wer_high,flexible_wer,flexible_wer_low,flexible_wer_high\n",
    );
    for row in rows {
        let _ = writeln!(
            text,
            "{},{},{},{},{}",
            row.label.replace(',', ";"),
            row.with_lm.utterances,
            row.with_lm.ref_words,
            csv_number(row.greedy.wer),
            csv_rates(&row.with_lm),
        );
    }
    text
}

/// A rate for the CSV files: six decimals, empty when undefined.
fn csv_number(value: Option<f64>) -> String {
    value.map_or_else(String::new, |v| format!("{v:.6}"))
}

/// `wer,wer_low,wer_high,flexible_wer,flexible_wer_low,flexible_wer_high` of a summary.
fn csv_rates(s: &Summary) -> String {
    [
        s.wer,
        s.wer_interval.map(|i| i.low),
        s.wer_interval.map(|i| i.high),
        s.flexible_wer,
        s.flexible_wer_interval.map(|i| i.low),
        s.flexible_wer_interval.map(|i| i.high),
    ]
    .map(csv_number)
    .join(",")
}

/// The condition table printed at the end.
fn render_condition_table(rows: &[ConditionRow]) -> String {
    let mut text =
        String::from("Unseen voices and channels (in-domain LM + grapheme lexicon), WER in %\n\n");
    let _ = writeln!(
        text,
        "{:<24} {:>10} {:>20} {:>20}",
        "condition", "greedy WER", "WER", "flexible WER"
    );
    for row in rows {
        let _ = writeln!(
            text,
            "{:<24} {:>10} {:>20} {:>20}",
            row.label,
            percent(row.greedy.wer),
            with_interval(row.with_lm.wer, row.with_lm.wer_interval),
            with_interval(row.with_lm.flexible_wer, row.with_lm.flexible_wer_interval)
        );
    }
    text
}

/// One row per (system, dialect) and one per system overall (`dialect` = `all`).
fn render_csv(systems: &[System]) -> String {
    let mut text = String::from(
        "system,dialect,utterances,ref_words,wer,wer_low,wer_high,flexible_wer,flexible_wer_low,flexible_wer_high\n",
    );
    for system in systems {
        for (dialect, s) in system
            .groups
            .iter()
            .map(|(d, s)| (d.as_str(), s))
            .chain(std::iter::once(("all", &system.overall)))
        {
            let _ = writeln!(
                text,
                "\"{}\",{},{},{},{}",
                system.name.replace('"', "\"\""),
                dialect,
                s.utterances,
                s.ref_words,
                csv_rates(s),
            );
        }
    }
    text
}

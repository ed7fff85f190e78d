//! Running a sweep: posteriors once per model, resources once per axis value, then every cell
//! decodes and scores, in parallel, with finished cells cached.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Instant;

use isogloss_acoustic::AcousticModel;
use isogloss_corpus::Manifest;
use isogloss_decoder::{Decoder, PrefixBeamSearch, SearchGraph, SearchOptions};
use isogloss_lexicon::Coverage;
use isogloss_lm::{evaluate_sentences, ArpaModel};
use isogloss_score::{
    report, score_system, BootstrapOptions, Hypotheses, PairedDifference, Reference, ScoreOptions,
    Summary, TokenRules, VariantMap,
};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::config::{model_name, Cell, Sweep, Tuning};
use crate::posteriors::{model_key, posteriors, Posteriors};
use crate::resources::{build_lexicon, build_lm, lm_words, ContentKey};
use crate::SweepError;

/// What a sweep reports as it goes, for a progress display.
#[derive(Debug, Clone)]
pub enum SweepEvent {
    /// The acoustic pass over a manifest finished.
    AcousticPass {
        /// Model name.
        model: String,
        /// Utterances computed (0: all cached).
        computed: usize,
        /// Seconds it took.
        seconds: f64,
    },
    /// The grid is known: this many cells will be decoded or read from the cache.
    Cells(usize),
    /// One cell finished.
    CellDone {
        /// Its label.
        label: String,
        /// Whether it came from the cache.
        cached: bool,
    },
    /// One cell failed; the others carry on.
    CellFailed {
        /// Its label.
        label: String,
        /// Why (the message names the file where there is one).
        reason: String,
    },
    /// Something the user should know (skipped combinations, estimation warnings).
    Note(String),
}

/// The figures of one cell.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct CellResult {
    /// Model name.
    pub model: String,
    /// Transcript column.
    pub column: String,
    /// LM name.
    pub lm: String,
    /// Lexicon name.
    pub lexicon: String,
    /// Beam width.
    pub beam: usize,
    /// LM weight used (tuned or fixed).
    pub lm_weight: f32,
    /// Word bonus used (tuned or fixed).
    pub word_bonus: f32,
    /// Whether weight and bonus were tuned on dev.
    pub tuned: bool,
    /// LM perplexity on the test transcripts of the column.
    pub perplexity: f64,
    /// LM out-of-vocabulary rate on the test transcripts.
    pub oov_rate: f64,
    /// Lexicon token coverage of the test transcripts.
    pub coverage: f64,
    /// Lexicon type coverage of the test transcripts.
    pub type_coverage: f64,
    /// Overall WER / flexible WER with intervals.
    pub overall: Summary,
    /// One summary per value of the grouping column.
    pub groups: Vec<(String, Summary)>,
    /// Search seconds over the test set.
    pub decode_seconds: f64,
    /// Real-time factor of the search alone (search seconds / audio seconds).
    pub search_rtf: f64,
    /// The cell's hypotheses file.
    pub hypotheses: PathBuf,
    /// Paired bootstrap against the baseline cell (absent for the baseline itself).
    pub versus_baseline: Option<PairedDifference>,
    /// Paired bootstrap of flexible WER against the baseline.
    pub flexible_versus_baseline: Option<PairedDifference>,
}

impl CellResult {
    /// A one-line label of the cell's axis values.
    pub fn label(&self) -> String {
        format!(
            "{} {} lm={} lexicon={} beam={} lm-weight={} word-bonus={}",
            self.model,
            self.column,
            self.lm,
            self.lexicon,
            self.beam,
            self.lm_weight,
            self.word_bonus
        )
    }
}

/// A cell whose LM, lexicon, decoding or scoring failed: its axis values and the reason.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct FailedCell {
    /// Model name.
    pub model: String,
    /// Transcript column.
    pub column: String,
    /// LM name.
    pub lm: String,
    /// Lexicon name.
    pub lexicon: String,
    /// Beam width.
    pub beam: usize,
    /// LM weight, or `None` when it was to be tuned on dev.
    pub lm_weight: Option<f32>,
    /// Word bonus, or `None` when it was to be tuned on dev.
    pub word_bonus: Option<f32>,
    /// Why the cell failed.
    pub reason: String,
    /// Its position in the grid, for listing failures in grid order.
    #[serde(skip)]
    position: usize,
}

impl FailedCell {
    fn new(
        sweep: &Sweep,
        model: &str,
        (position, cell): (usize, &Cell),
        reason: String,
    ) -> FailedCell {
        FailedCell {
            model: model.to_string(),
            column: sweep.columns[cell.column].clone(),
            lm: sweep.lms[cell.lm].name().to_string(),
            lexicon: sweep.lexicons[cell.lexicon].name.clone(),
            beam: cell.beam,
            lm_weight: cell.lm_weight,
            word_bonus: cell.word_bonus,
            reason,
            position,
        }
    }

    fn from_result(cell: &CellResult, position: usize, reason: String) -> FailedCell {
        FailedCell {
            model: cell.model.clone(),
            column: cell.column.clone(),
            lm: cell.lm.clone(),
            lexicon: cell.lexicon.clone(),
            beam: cell.beam,
            lm_weight: Some(cell.lm_weight),
            word_bonus: Some(cell.word_bonus),
            reason,
            position,
        }
    }

    /// A one-line label of the cell's axis values, as [`CellResult::label`] writes it (`dev`
    /// for a value that was to be tuned).
    pub fn label(&self) -> String {
        let value = |v: Option<f32>| v.map_or_else(|| "dev".to_string(), |v| v.to_string());
        format!(
            "{} {} lm={} lexicon={} beam={} lm-weight={} word-bonus={}",
            self.model,
            self.column,
            self.lm,
            self.lexicon,
            self.beam,
            value(self.lm_weight),
            value(self.word_bonus)
        )
    }
}

/// Everything a sweep produced.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SweepResults {
    /// One entry per cell that ran to the end, in grid order.
    pub cells: Vec<CellResult>,
    /// The cells that failed, in grid order, with their reasons (the sweep carries on past
    /// them).
    #[serde(default)]
    pub failed: Vec<FailedCell>,
    /// Index of the baseline cell in `cells`, when it ran.
    pub baseline: Option<usize>,
    /// Utterances that went through an acoustic model in this run.
    pub acoustic_runs: usize,
    /// Seconds of the acoustic passes in this run.
    pub acoustic_seconds: f64,
    /// Cells decoded in this run (the rest came from the cache).
    pub cells_decoded: usize,
    /// Test audio in seconds.
    pub audio_seconds: f64,
    /// Combinations left out, with the reason.
    pub skipped: Vec<String>,
    /// Confidence level of the bootstrap intervals.
    pub confidence: f64,
}

/// A lexicon ready for one (column, LM, lexicon) combination: its entries, its content key,
/// and its token and type coverage of the test transcripts.
type BuiltCellLexicon = (Vec<(String, Vec<String>)>, String, f64, f64);

/// One model's data for the whole run.
struct ModelPass {
    name: String,
    units: Vec<String>,
    test: Posteriors,
    dev: Option<Posteriors>,
}

fn sentences_of(manifest: &Manifest, column: &str) -> Result<Vec<Vec<String>>, SweepError> {
    let index = manifest
        .column_index(column)
        .map_err(|e| SweepError::Build(e.to_string()))?;
    Ok(manifest
        .utterances
        .iter()
        .map(|u| {
            u.transcripts[index]
                .split_whitespace()
                .map(str::to_string)
                .collect()
        })
        .collect())
}

fn audio_seconds(manifest: &Manifest) -> f64 {
    manifest
        .utterances
        .iter()
        .map(|u| match (u.start, u.end) {
            (Some(start), Some(end)) => end - start,
            _ => isogloss_audio::probe(&u.audio)
                .map(|info| info.duration_seconds - u.start.unwrap_or(0.0))
                .unwrap_or(0.0),
        })
        .sum()
}

/// Decodes every utterance that has posteriors, in manifest order, into a hypotheses file.
fn decode_to_file(
    manifest: &Manifest,
    posteriors: &Posteriors,
    graph: &SearchGraph,
    lm: &ArpaModel,
    options: &SearchOptions,
    path: &Path,
) -> Result<f64, SweepError> {
    let started = Instant::now();
    let mut search = PrefixBeamSearch::new(graph, lm, options.clone());
    let mut rows = Vec::new();
    for utterance in &manifest.utterances {
        if let Some(readings) = posteriors.by_id.get(&utterance.id) {
            let views: Vec<_> = readings.iter().map(|p| p.view()).collect();
            let (transcript, _) = search
                .decode_readings(&views)
                .map_err(|e| SweepError::Build(format!("{}: {e}", utterance.id)))?;
            rows.push(vec![utterance.id.clone(), transcript.text()]);
        }
    }
    let seconds = started.elapsed().as_secs_f64();
    isogloss_corpus::tsv::write_table(path, &["id", "text"], &rows)
        .map_err(|e| SweepError::Build(e.to_string()))?;
    Ok(seconds)
}

fn word_error_rate(manifest: &Path, column: &str, hypotheses: &Path) -> Result<f64, SweepError> {
    let score_error = |e: isogloss_score::ScoreError| SweepError::Build(e.to_string());
    let reference = Reference::read(manifest, column, &[]).map_err(score_error)?;
    let hypotheses = Hypotheses::read(hypotheses).map_err(score_error)?;
    let system =
        score_system(&reference, &hypotheses, None, &TokenRules::default()).map_err(score_error)?;
    let counts: isogloss_score::ErrorCounts = system.utterances.iter().map(|u| u.plain).sum();
    Ok(counts.error_rate().unwrap_or(0.0))
}

/// Runs the sweep. Bad axis values were refused by [`Sweep::read`]; what can still fail here is
/// reading the data itself.
pub fn run(
    sweep: &Sweep,
    progress: &(dyn Fn(SweepEvent) + Sync),
) -> Result<SweepResults, SweepError> {
    let corpus_error = |e: isogloss_corpus::CorpusError| SweepError::Build(e.to_string());
    let test = Manifest::read(&sweep.test).map_err(corpus_error)?;
    let dev = sweep
        .dev
        .as_deref()
        .map(Manifest::read)
        .transpose()
        .map_err(corpus_error)?;
    for column in &sweep.columns {
        test.column_index(column).map_err(corpus_error)?;
        if let Some(dev) = &dev {
            dev.column_index(column).map_err(corpus_error)?;
        }
    }
    let cache = sweep.out_dir.join("cache");
    let mut results = SweepResults {
        cells: Vec::new(),
        failed: Vec::new(),
        baseline: None,
        acoustic_runs: 0,
        acoustic_seconds: 0.0,
        cells_decoded: 0,
        audio_seconds: audio_seconds(&test),
        skipped: Vec::new(),
        confidence: sweep.confidence,
    };

    // 1. One acoustic pass per model (and dev set when tuning), through the posterior cache.
    let mut passes = Vec::new();
    for dir in &sweep.models {
        let model = AcousticModel::load(dir).map_err(|e| SweepError::Build(e.to_string()))?;
        let key = model_key(dir)?;
        let name = model_name(dir);
        let test_pass = posteriors(&model, &key, &test, &cache.join("posteriors"))?;
        progress(SweepEvent::AcousticPass {
            model: name.clone(),
            computed: test_pass.computed,
            seconds: test_pass.seconds,
        });
        results.acoustic_runs += test_pass.computed;
        results.acoustic_seconds += test_pass.seconds;
        for (id, message) in &test_pass.failed {
            progress(SweepEvent::Note(format!(
                "{name}: utterance {id} failed: {message}"
            )));
        }
        let dev_pass = match (&dev, sweep.decoder.tuning) {
            (Some(dev), Tuning::Grid | Tuning::Coordinate) => {
                let pass = posteriors(&model, &key, dev, &cache.join("posteriors"))?;
                results.acoustic_runs += pass.computed;
                results.acoustic_seconds += pass.seconds;
                Some(pass)
            }
            _ => None,
        };
        passes.push(ModelPass {
            name,
            units: model.units().to_vec(),
            test: test_pass,
            dev: dev_pass,
        });
    }

    // 2. LMs per (column, LM) and lexicons per (column, LM, lexicon), with their figures. One
    // that fails (or panics) is the failure of every cell that uses it; the others go on.
    let mut lms: HashMap<(usize, usize), (ArpaModel, PathBuf, f64, f64)> = HashMap::new();
    let mut lexicons: HashMap<(usize, usize, usize), BuiltCellLexicon> = HashMap::new();
    let mut lm_failures: HashMap<(usize, usize), String> = HashMap::new();
    let mut lexicon_failures: HashMap<(usize, usize, usize), String> = HashMap::new();
    for (c, column) in sweep.columns.iter().enumerate() {
        let test_sentences = sentences_of(&test, column)?;
        let dev_sentences = dev.as_ref().map(|d| sentences_of(d, column)).transpose()?;
        let test_tokens: Vec<&str> = test_sentences
            .iter()
            .flatten()
            .map(String::as_str)
            .collect();
        for (l, choice) in sweep.lms.iter().enumerate() {
            let built = contained(|| {
                let built = build_lm(choice, column, dev_sentences.as_deref(), &cache.join("lms"))?;
                let figures = evaluate_sentences(&built.model, test_sentences.iter().cloned());
                Ok((built, figures))
            });
            let (built, figures) = match built {
                Ok(built) => built,
                Err(reason) => {
                    lm_failures.insert((c, l), format!("LM {}: {reason}", choice.name()));
                    continue;
                }
            };
            for warning in &built.warnings {
                progress(SweepEvent::Note(format!(
                    "LM {} ({column}): {warning}",
                    choice.name()
                )));
            }
            let words = lm_words(&built.model);
            for (x, lexicon_choice) in sweep.lexicons.iter().enumerate() {
                let lexicon = contained(|| {
                    let lexicon = build_lexicon(lexicon_choice, &words)?;
                    let coverage = Coverage::count(&lexicon.lexicon, test_tokens.iter().copied());
                    Ok((lexicon, coverage))
                });
                let (lexicon, coverage) = match lexicon {
                    Ok(built) => built,
                    Err(reason) => {
                        lexicon_failures.insert(
                            (c, l, x),
                            format!("lexicon {}: {reason}", lexicon_choice.name),
                        );
                        continue;
                    }
                };
                if !lexicon.uncovered.is_empty() {
                    progress(SweepEvent::Note(format!(
                        "lexicon {} ({column}, LM {}): {} words got no pronunciation, e.g. {}",
                        lexicon_choice.name,
                        choice.name(),
                        lexicon.uncovered.len(),
                        lexicon.uncovered[0]
                    )));
                }
                let mut key = ContentKey::new();
                for (word, units) in &lexicon.lexicon.entries {
                    key.text(word);
                    key.text(&units.join(" "));
                }
                lexicons.insert(
                    (c, l, x),
                    (
                        lexicon.lexicon.entries,
                        key.finish(),
                        coverage.token_rate(),
                        coverage.type_rate(),
                    ),
                );
            }
            lms.insert(
                (c, l),
                (
                    built.model,
                    built.path,
                    figures.perplexity(),
                    figures.oov_rate(),
                ),
            );
        }
    }

    // 3. The cells, after leaving out model × lexicon pairs whose units do not fit.
    let mut graphs: HashMap<(usize, usize, usize, usize), SearchGraph> = HashMap::new();
    let mut cells: Vec<(usize, Cell)> = Vec::new();
    let mut left_out = std::collections::HashSet::new();
    let mut failed_early: Vec<FailedCell> = Vec::new();
    let mut graph_failures: HashMap<(usize, usize, usize, usize), String> = HashMap::new();
    for (position, cell) in sweep.cells().into_iter().enumerate() {
        let model = &passes[cell.model].name;
        let graph_key = (cell.model, cell.column, cell.lm, cell.lexicon);
        let failure = lm_failures
            .get(&(cell.column, cell.lm))
            .or_else(|| lexicon_failures.get(&(cell.column, cell.lm, cell.lexicon)))
            .or_else(|| graph_failures.get(&graph_key));
        if let Some(reason) = failure {
            failed_early.push(FailedCell::new(
                sweep,
                model,
                (position, &cell),
                reason.clone(),
            ));
            continue;
        }
        if let std::collections::hash_map::Entry::Vacant(slot) = graphs.entry(graph_key) {
            let entries = &lexicons[&(cell.column, cell.lm, cell.lexicon)].0;
            let units = passes[cell.model].units.clone();
            let built = std::panic::catch_unwind(|| SearchGraph::with_lexicon(units, entries));
            let built = match built {
                Ok(built) => built,
                Err(payload) => {
                    let reason = format!(
                        "lexicon {}: the search graph of model {model}: {}",
                        sweep.lexicons[cell.lexicon].name,
                        defect(payload.as_ref())
                    );
                    failed_early.push(FailedCell::new(
                        sweep,
                        model,
                        (position, &cell),
                        reason.clone(),
                    ));
                    graph_failures.insert(graph_key, reason);
                    continue;
                }
            };
            match built {
                Ok((graph, report)) => {
                    if !report.unknown_units.is_empty() {
                        progress(SweepEvent::Note(format!(
                            "model {} × lexicon {}: {} entries use units the model lacks (e.g. {} uses {})",
                            passes[cell.model].name,
                            sweep.lexicons[cell.lexicon].name,
                            report.unknown_units.len(),
                            report.unknown_units[0].0,
                            report.unknown_units[0].1
                        )));
                    }
                    slot.insert(graph);
                }
                Err(error) => {
                    let reason = format!(
                        "model {} × lexicon {} left out: {error}",
                        passes[cell.model].name, sweep.lexicons[cell.lexicon].name
                    );
                    // One note per model × lexicon pair, not one per writing and LM vocabulary.
                    if left_out.insert((cell.model, cell.lexicon)) {
                        progress(SweepEvent::Note(reason.clone()));
                        results.skipped.push(reason);
                    }
                    continue;
                }
            }
        }
        cells.push((position, cell));
    }
    progress(SweepEvent::Cells(cells.len() + failed_early.len()));
    for failure in &failed_early {
        progress(SweepEvent::CellFailed {
            label: failure.label(),
            reason: failure.reason.clone(),
        });
    }

    let decoded = AtomicUsize::new(0);
    let cell_dir = sweep.out_dir.join("cells");
    let scored: Vec<Result<(usize, CellResult, bool), Box<FailedCell>>> = cells
        .par_iter()
        .map(|(position, cell)| {
            let outcome = contained(|| {
                let pass = &passes[cell.model];
                let column = &sweep.columns[cell.column];
                let (lm, lm_path, perplexity, oov_rate) = &lms[&(cell.column, cell.lm)];
                let (_, lexicon_key, coverage, type_coverage) =
                    &lexicons[&(cell.column, cell.lm, cell.lexicon)];
                let graph = &graphs[&(cell.model, cell.column, cell.lm, cell.lexicon)];
                let mut key = ContentKey::new();
                key.text("cell v1");
                key.text(&pass.test.key);
                key.text(column);
                key.file(lm_path)?;
                key.text(lexicon_key);
                key.file(&sweep.test)?;
                key.text(&format!(
                    "{} {:?} {:?}",
                    cell.beam, cell.lm_weight, cell.word_bonus
                ));
                if let Some(dev) = &sweep.dev {
                    if let (None, Some(dev_pass)) = (cell.lm_weight, &pass.dev) {
                        key.file(dev)?;
                        key.text(&dev_pass.key);
                        key.text(&format!(
                            "{:?} {:?} {:?}",
                            sweep.decoder.tuning,
                            sweep.decoder.lm_weights,
                            sweep.decoder.word_bonuses
                        ));
                    }
                }
                let dir = cell_dir.join(key.finish());
                let hypotheses = dir.join("hyp.tsv");
                let settings_path = dir.join("settings.json");
                let cached: Option<(f32, f32, f64)> = std::fs::read_to_string(&settings_path)
                    .ok()
                    .and_then(|text| serde_json::from_str(&text).ok())
                    .filter(|_| hypotheses.exists());
                let (lm_weight, word_bonus, decode_seconds, was_cached) = match cached {
                    Some((w, b, s)) => (w, b, s, true),
                    None => {
                        let options_for = |w: f32, b: f32| SearchOptions {
                            beam: cell.beam,
                            lm_weight: w,
                            word_bonus: b,
                            ..SearchOptions::default()
                        };
                        let (w, b) = match (cell.lm_weight, cell.word_bonus) {
                            (Some(w), Some(b)) => (w, b),
                            _ => {
                                let (dev_manifest, dev_pass) = match (&dev, &pass.dev) {
                                    (Some(m), Some(p)) => (m, p),
                                    _ => {
                                        return Err(SweepError::Build(
                                            "tuning needs dev posteriors".into(),
                                        ))
                                    }
                                };
                                let dev_hypotheses = dir.join("dev-hyp.tsv");
                                let mut dev_wer = |w: f32, b: f32| -> Result<f64, SweepError> {
                                    decode_to_file(
                                        dev_manifest,
                                        dev_pass,
                                        graph,
                                        lm,
                                        &options_for(w, b),
                                        &dev_hypotheses,
                                    )?;
                                    word_error_rate(&dev_manifest.path, column, &dev_hypotheses)
                                };
                                let (w, b, tried) = tune(
                                    sweep.decoder.tuning,
                                    &sweep.decoder.lm_weights,
                                    &sweep.decoder.word_bonuses,
                                    &mut dev_wer,
                                )?;
                                let mut trace = String::from("lm_weight\tword_bonus\tdev_wer\n");
                                for (w, b, wer) in &tried {
                                    trace.push_str(&format!("{w}\t{b}\t{wer:.6}\n"));
                                }
                                let trace_path = dir.join("tuning.tsv");
                                std::fs::write(&trace_path, trace).map_err(|source| {
                                    SweepError::Io {
                                        path: trace_path.clone(),
                                        source,
                                    }
                                })?;
                                (w, b)
                            }
                        };
                        let seconds = decode_to_file(
                            &test,
                            &pass.test,
                            graph,
                            lm,
                            &options_for(w, b),
                            &hypotheses,
                        )?;
                        let settings = serde_json::to_string(&(w, b, seconds)).unwrap_or_default();
                        std::fs::write(&settings_path, settings).map_err(|source| {
                            SweepError::Io {
                                path: settings_path.clone(),
                                source,
                            }
                        })?;
                        decoded.fetch_add(1, Ordering::Relaxed);
                        (w, b, seconds, false)
                    }
                };
                let result = CellResult {
                    model: pass.name.clone(),
                    column: column.clone(),
                    lm: sweep.lms[cell.lm].name().to_string(),
                    lexicon: sweep.lexicons[cell.lexicon].name.clone(),
                    beam: cell.beam,
                    lm_weight,
                    word_bonus,
                    tuned: cell.lm_weight.is_none(),
                    perplexity: *perplexity,
                    oov_rate: *oov_rate,
                    coverage: *coverage,
                    type_coverage: *type_coverage,
                    overall: empty_summary(),
                    groups: Vec::new(),
                    decode_seconds,
                    search_rtf: decode_seconds / results.audio_seconds.max(1e-9),
                    hypotheses,
                    versus_baseline: None,
                    flexible_versus_baseline: None,
                };
                progress(SweepEvent::CellDone {
                    label: result.label(),
                    cached: was_cached,
                });
                let is_baseline = cell.model == sweep.baseline.model
                    && cell.column == sweep.baseline.column
                    && cell.lm == sweep.baseline.lm
                    && cell.lexicon == sweep.baseline.lexicon;
                Ok((result, is_baseline))
            });
            outcome
                .map(|(result, is_baseline)| (*position, result, is_baseline))
                .map_err(|reason| {
                    let failure =
                        FailedCell::new(sweep, &passes[cell.model].name, (*position, cell), reason);
                    progress(SweepEvent::CellFailed {
                        label: failure.label(),
                        reason: failure.reason.clone(),
                    });
                    Box::new(failure)
                })
        })
        .collect();
    results.cells_decoded = decoded.load(Ordering::Relaxed);
    let mut decoded_cells = Vec::new();
    let mut failed_late = Vec::new();
    for item in scored {
        match item {
            Ok(cell) => decoded_cells.push(cell),
            Err(failure) => failed_late.push(*failure),
        }
    }
    score_cells(sweep, &mut results, decoded_cells, &mut failed_late)?;
    // Failures found before decoding and after it, merged in grid order.
    results.failed = failed_early;
    results.failed.extend(failed_late);
    results.failed.sort_by_key(|f| f.position);
    Ok(results)
}

/// Runs one piece of a sweep's work (an LM, a lexicon, a cell); its error, or a panic inside
/// it (a defect), becomes the reason the cells that depend on it failed, so that the sweep
/// carries on with the others. Finished cells are cached in `OUT/cells/`: a new run decodes
/// only the failed ones again.
fn contained<T>(work: impl FnOnce() -> Result<T, SweepError>) -> Result<T, String> {
    match std::panic::catch_unwind(std::panic::AssertUnwindSafe(work)) {
        Ok(outcome) => outcome.map_err(|error| error.to_string()),
        Err(payload) => Err(defect(payload.as_ref())),
    }
}

/// The reason given for a panic caught inside a sweep.
fn defect(payload: &(dyn std::any::Any + Send)) -> String {
    let detail = payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "no message".into());
    format!("processing failed inside isogloss (a defect; please report it): {detail}")
}

/// What tuning chose: LM weight, word bonus, and every `(weight, bonus, dev WER)` tried in order.
pub type TuningOutcome = (f32, f32, Vec<(f32, f32, f64)>);

/// Chooses LM weight and word bonus from the lists by the dev WER `dev_wer(w, b)`, returning the
/// choice and every pair tried with its dev WER, in the order tried. Ties keep the pair found
/// first. `Grid` tries every pair; `Coordinate` starts from the middle of both lists and
/// alternately moves the weight (bonus fixed) and the bonus (weight fixed) to their best values
/// until a round changes neither; every pair is decoded at most once.
pub fn tune(
    tuning: Tuning,
    weights: &[f32],
    bonuses: &[f32],
    dev_wer: &mut dyn FnMut(f32, f32) -> Result<f64, SweepError>,
) -> Result<TuningOutcome, SweepError> {
    if weights.is_empty() || bonuses.is_empty() {
        return Err(SweepError::Build(
            "tuning needs at least one LM weight and one word bonus".into(),
        ));
    }
    let mut tried: Vec<(usize, usize, f64)> = Vec::new();
    let mut measure = |i: usize, j: usize, tried: &mut Vec<(usize, usize, f64)>| {
        if let Some(&(_, _, wer)) = tried.iter().find(|t| t.0 == i && t.1 == j) {
            return Ok(wer);
        }
        let wer = dev_wer(weights[i], bonuses[j])?;
        tried.push((i, j, wer));
        Ok::<f64, SweepError>(wer)
    };
    let (mut best_i, mut best_j) = (0usize, 0usize);
    match tuning {
        Tuning::None | Tuning::Grid => {
            let mut best = f64::INFINITY;
            for i in 0..weights.len() {
                for j in 0..bonuses.len() {
                    let wer = measure(i, j, &mut tried)?;
                    if wer < best {
                        (best, best_i, best_j) = (wer, i, j);
                    }
                }
            }
        }
        Tuning::Coordinate => {
            (best_i, best_j) = ((weights.len() - 1) / 2, (bonuses.len() - 1) / 2);
            let mut best = measure(best_i, best_j, &mut tried)?;
            loop {
                let before = (best_i, best_j);
                for i in 0..weights.len() {
                    let wer = measure(i, best_j, &mut tried)?;
                    if wer < best {
                        (best, best_i) = (wer, i);
                    }
                }
                for j in 0..bonuses.len() {
                    let wer = measure(best_i, j, &mut tried)?;
                    if wer < best {
                        (best, best_j) = (wer, j);
                    }
                }
                if (best_i, best_j) == before {
                    break;
                }
            }
        }
    }
    Ok((
        weights[best_i],
        bonuses[best_j],
        tried
            .into_iter()
            .map(|(i, j, wer)| (weights[i], bonuses[j], wer))
            .collect(),
    ))
}

fn empty_summary() -> Summary {
    isogloss_score::summarize(std::iter::empty(), &BootstrapOptions::default())
}

/// Scores every decoded cell against the test manifest, with the paired comparison to the
/// baseline, into `results.cells`; a cell whose hypotheses cannot be read or scored joins
/// `failed`. What every cell needs (the references and spelling variants) is read first: it
/// failing is an error of the whole sweep.
fn score_cells(
    sweep: &Sweep,
    results: &mut SweepResults,
    decoded: Vec<(usize, CellResult, bool)>,
    failed: &mut Vec<FailedCell>,
) -> Result<(), SweepError> {
    let score_error = |e: isogloss_score::ScoreError| SweepError::Build(e.to_string());
    let options = ScoreOptions {
        bootstrap: BootstrapOptions {
            resamples: sweep.resamples,
            seed: sweep.seed,
            confidence: sweep.confidence,
        },
        ..ScoreOptions::default()
    };
    let mut references: HashMap<String, Reference> = HashMap::new();
    let mut variants: HashMap<String, Option<VariantMap>> = HashMap::new();
    for column in &sweep.columns {
        let reference = Reference::read(&sweep.test, column, std::slice::from_ref(&sweep.group_by))
            .map_err(score_error)?;
        references.insert(column.clone(), reference);
        let map = sweep
            .variants
            .get(column)
            .map(|p| VariantMap::read(p, &options.rules))
            .transpose()
            .map_err(score_error)?;
        variants.insert(column.clone(), map);
    }
    let systems: Vec<Result<isogloss_score::ScoredSystem, String>> = decoded
        .par_iter()
        .map(|(_, cell, _)| {
            contained(|| {
                let hypotheses = Hypotheses::read(&cell.hypotheses).map_err(score_error)?;
                score_system(
                    &references[&cell.column],
                    &hypotheses,
                    variants[&cell.column].as_ref(),
                    &options.rules,
                )
                .map_err(score_error)
            })
        })
        .collect();
    let mut scored = Vec::new();
    for ((position, cell, is_baseline), system) in decoded.into_iter().zip(systems) {
        match system {
            Ok(system) => scored.push((cell, is_baseline, system)),
            Err(reason) => failed.push(FailedCell::from_result(&cell, position, reason)),
        }
    }
    let baseline = scored.iter().position(|(_, is_baseline, _)| *is_baseline);
    results.baseline = baseline;
    let baseline_system = baseline.map(|b| &scored[b].2);
    let reports: Vec<_> = scored
        .par_iter()
        .enumerate()
        .map(|(index, (cell, _, system))| {
            // The comparison puts the baseline first, so differences read as "cell − baseline".
            let second = (Some(index) != baseline).then_some(system);
            match (baseline_system, second) {
                (Some(base), Some(this)) => {
                    let full = report(
                        &references[&cell.column],
                        base,
                        Some(this),
                        variants[&cell.column].as_ref(),
                        &options,
                    );
                    let own = report(
                        &references[&cell.column],
                        this,
                        None,
                        variants[&cell.column].as_ref(),
                        &options,
                    );
                    (own, full.comparison)
                }
                _ => (
                    report(
                        &references[&cell.column],
                        system,
                        None,
                        variants[&cell.column].as_ref(),
                        &options,
                    ),
                    None,
                ),
            }
        })
        .collect();
    for ((mut cell, _, _), (own, comparison)) in scored.into_iter().zip(reports) {
        cell.overall = own.overall;
        cell.groups = own
            .groups
            .into_iter()
            .map(|g| (g.value, g.summary))
            .collect();
        if let Some(comparison) = comparison {
            cell.versus_baseline = comparison.wer_difference;
            cell.flexible_versus_baseline = comparison.flexible_wer_difference;
        }
        results.cells.push(cell);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A dev "WER" surface with its minimum at weight 1.0, bonus 2.0 and no interaction between
    /// the two, so that coordinate search must find the same pair as the full grid.
    fn bowl(w: f32, b: f32) -> f64 {
        f64::from((w - 1.0).powi(2) + 0.5 * (b - 2.0).powi(2))
    }

    #[test]
    fn coordinate_search_finds_the_grid_optimum_with_fewer_decodes() {
        let weights = [0.2, 0.6, 1.0, 1.4, 1.8];
        let bonuses = [0.0, 1.0, 2.0, 3.0, 4.0];
        let mut calls = 0;
        let grid = tune(Tuning::Grid, &weights, &bonuses, &mut |w, b| {
            calls += 1;
            Ok(bowl(w, b))
        })
        .unwrap();
        assert_eq!((grid.0, grid.1), (1.0, 2.0));
        assert_eq!(calls, 25);
        assert_eq!(grid.2.len(), 25);
        let mut calls = 0;
        let coordinate = tune(Tuning::Coordinate, &weights, &bonuses, &mut |w, b| {
            calls += 1;
            Ok(bowl(w, b))
        })
        .unwrap();
        assert_eq!((coordinate.0, coordinate.1), (1.0, 2.0));
        // Start (1.0, 2.0) is already the optimum: one weight sweep (5 pairs, the start among
        // them) and one bonus sweep (4 new pairs).
        assert_eq!(calls, 9);
        assert_eq!(coordinate.2.len(), 9);
    }

    #[test]
    fn coordinate_search_walks_to_an_off_centre_optimum() {
        let weights = [0.2, 0.6, 1.0, 1.4, 1.8];
        let bonuses = [0.0, 1.0, 2.0, 3.0, 4.0];
        // Optimum at the corner (1.8, 0.0), with the two settings interacting.
        let surface = |w: f32, b: f32| f64::from((w - 1.8).powi(2) + (b - 0.5 * w + 0.9).powi(2));
        let grid = tune(Tuning::Grid, &weights, &bonuses, &mut |w, b| {
            Ok(surface(w, b))
        })
        .unwrap();
        let coordinate = tune(Tuning::Coordinate, &weights, &bonuses, &mut |w, b| {
            Ok(surface(w, b))
        })
        .unwrap();
        assert_eq!((grid.0, grid.1), (1.8, 0.0));
        assert_eq!((coordinate.0, coordinate.1), (grid.0, grid.1));
        assert!(coordinate.2.len() < grid.2.len());
        // No pair is decoded twice.
        let mut pairs: Vec<(u32, u32)> = coordinate
            .2
            .iter()
            .map(|t| (t.0.to_bits(), t.1.to_bits()))
            .collect();
        pairs.sort_unstable();
        pairs.dedup();
        assert_eq!(pairs.len(), coordinate.2.len());
    }

    #[test]
    fn a_panic_inside_a_piece_of_work_becomes_its_reason_and_the_caller_goes_on() {
        // Work of a cell that panics with a formatted message, as an indexing defect would.
        let index = 7;
        let panicked: Result<u32, String> = contained(|| {
            let empty: Vec<u32> = Vec::new();
            if index >= empty.len() {
                panic!("index {index} out of range for a grid of {}", empty.len());
            }
            Ok(empty[index])
        });
        let reason = panicked.unwrap_err();
        assert!(
            reason.starts_with("processing failed inside isogloss (a defect"),
            "{reason}"
        );
        assert!(
            reason.ends_with("index 7 out of range for a grid of 0"),
            "{reason}"
        );
        // A literal message, an error and a success, one after the other: the panic above left
        // nothing behind.
        let literal: Result<(), String> = contained(|| panic!("no lexicon"));
        assert!(literal.unwrap_err().ends_with(": no lexicon"));
        let failed: Result<(), String> = contained(|| Err(SweepError::Build("bad LM".into())));
        assert!(failed.unwrap_err().contains("bad LM"));
        assert_eq!(contained(|| Ok(3)), Ok(3));
    }

    #[test]
    fn an_error_while_tuning_is_passed_on() {
        let result = tune(Tuning::Coordinate, &[1.0], &[1.0], &mut |_, _| {
            Err(SweepError::Build("dev decoding failed".into()))
        });
        assert!(result
            .unwrap_err()
            .to_string()
            .contains("dev decoding failed"));
    }
}

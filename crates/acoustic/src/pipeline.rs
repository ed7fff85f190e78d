//! From manifests to a model directory, and from a model to posteriors: the file-level work
//! behind `isogloss train` and `isogloss transcribe`.
//!
//! Training audio is decoded once into a PCM cache (`MODEL_DIR/cache/<key>/train.pcm`, see
//! [`crate::audio_set`]) and every epoch computes its features afresh from it, perturbed per
//! utterance. Dev features are computed once, unperturbed, and cached as safetensors under
//! `MODEL_DIR/cache/<key>/dev/`. The key hashes the manifests, the sizes and modification times
//! of their audio files and the front end; normalisation (CMVN) is applied in memory afterwards.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use isogloss_corpus::Manifest;
use isogloss_features::{
    read_features, write_features, Cmvn, CmvnMode, FeatureConfig, FeatureExtractor,
    SpeakerCmvnStats,
};
use isogloss_lexicon::Lexicon;
use ndarray::Array2;
use rayon::prelude::*;
use sha2::{Digest, Sha256};

use crate::audio_set::{AudioSet, AudioUtterance, PcmStore, Perturbation};
use crate::collective::{balanced_share, Collective, SingleProcess};
use crate::config::ModelConfig;
use crate::data::{ShardedSet, TrainingData};
use crate::model::{AcousticModel, ModelDescription, Provenance, MODEL_FORMAT};
use crate::speaker_vectors::{
    cached_extractor, train_extractor, with_vectors, ExtractorOutcome, ExtractorProgress,
};
use crate::train::{checkpoint_path, EpochRecord, PreparedUtterance, Trainer, TrainingEvent};
use crate::units::{grapheme_sequence, transcript_words, UnitInventory, UnitKind};
use crate::warp_search::{Candidate, Frontend};
use crate::AcousticError;

/// The feature matrices of one utterance (one per perturbation), or why there are none.
pub type UtteranceFeatures = Result<Vec<Array2<f32>>, String>;

/// Decodes the given segments of one audio file into 16 kHz mono samples:
/// [`isogloss_audio::read_segments`], or a stand-in in tests.
pub type SegmentReader<'a> = dyn Fn(&Path, &[isogloss_audio::Segment]) -> Result<Vec<Vec<f32>>, isogloss_audio::AudioError>
    + Sync
    + 'a;

/// What `isogloss train` asks for.
#[derive(Debug, Clone)]
pub struct TrainOptions {
    /// Training manifest.
    pub train_manifest: PathBuf,
    /// Dev manifest (early stopping, error rate).
    pub dev_manifest: PathBuf,
    /// Transcript column to learn.
    pub column: String,
    /// Model directory to write.
    pub out: PathBuf,
    /// Architecture, training and front-end settings.
    pub config: ModelConfig,
    /// Overrides `config.training.epochs`.
    pub epochs: Option<usize>,
    /// Train for this many minutes of wall time (feature preparation excluded) instead of a
    /// number of epochs; the learning-rate schedule is planned to end when they run out.
    pub minutes: Option<f64>,
    /// Continue from `out/checkpoint.safetensors`.
    pub resume: bool,
    /// Seed of every random choice.
    pub seed: u64,
    /// Phone units from this lexicon instead of graphemes.
    pub lexicon: Option<PathBuf>,
    /// Start from the weights of this model directory (same network and front end as
    /// `config`; its units are kept) instead of a random initialisation. Ignored on resume:
    /// the checkpoint has the weights.
    pub start_from: Option<PathBuf>,
    /// Compute the next batch's features on a background thread while a batch trains
    /// ([`Trainer::set_prefetch`]); the weights are the same either way.
    pub prefetch: bool,
}

/// Progress of the whole run, for the CLI to draw.
#[derive(Debug, Clone)]
pub enum PipelineEvent {
    /// Feature extraction: `done` of `total` audio files of a split.
    Features {
        /// "train" or "dev".
        split: &'static str,
        /// Files done.
        done: usize,
        /// Files in the split.
        total: usize,
    },
    /// Something the user should know that does not stop the run.
    Warning(String),
    /// One step of training the i-vector extractor (before the network).
    SpeakerVectors(ExtractorProgress),
    /// The i-vector extractor was read from the cache of an earlier run instead of trained.
    SpeakerVectorsCached,
    /// The training loop.
    Training(TrainingEvent),
}

/// What a training run did.
#[derive(Debug, Clone, Default)]
pub struct TrainSummary {
    /// Epochs completed in total (including earlier runs when resuming).
    pub epochs_done: usize,
    /// The epoch whose weights are in the model directory (`[training] keep` chooses it).
    pub kept: Option<EpochRecord>,
    /// Training utterances skipped because their labels do not fit the frames (id, available
    /// output frames, needed).
    pub skipped_utterances: Vec<(String, usize, usize)>,
    /// Utterances whose audio could not be read (id with manifest line, error).
    pub failed_utterances: Vec<String>,
    /// True when training stopped because the dev loss stopped improving.
    pub stopped_early: bool,
}

fn sha256_file(path: &Path) -> Result<String, AcousticError> {
    let bytes = std::fs::read(path).map_err(|source| AcousticError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    Ok(format!("{:x}", Sha256::digest(&bytes)))
}

/// Digest of a manifest and of the size and modification time of every audio file it names, so
/// that a cache made from it is rebuilt when an audio file is replaced.
fn manifest_digest(path: &Path, manifest: &Manifest) -> Result<String, AcousticError> {
    let mut hasher = Sha256::new();
    hasher.update(sha256_file(path)?.as_bytes());
    let files: std::collections::BTreeSet<&Path> = manifest
        .utterances
        .iter()
        .map(|u| u.audio.as_path())
        .collect();
    for file in files {
        let stamp = std::fs::metadata(file)
            .map(|m| {
                let modified = m
                    .modified()
                    .ok()
                    .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
                    .map_or(0, |d| d.as_nanos());
                format!("{}:{modified}", m.len())
            })
            .unwrap_or_else(|_| "missing".into());
        hasher.update(format!("{}\t{stamp}\n", file.display()).as_bytes());
    }
    Ok(format!("{:x}", hasher.finalize()))
}

fn read_manifest(path: &Path, column: &str) -> Result<(Manifest, usize), AcousticError> {
    let manifest = Manifest::read(path)?;
    if manifest.utterances.is_empty() {
        return Err(AcousticError::Input {
            path: path.to_path_buf(),
            problem:
                "the manifest lists no utterances (expected at least one row after the header)"
                    .into(),
        });
    }
    let column = manifest.column_index(column)?;
    Ok((manifest, column))
}

/// Unit names of one transcript: graphemes with `<wb>`, or the lexicon's first pronunciation of
/// each word.
fn unit_names(
    text: &str,
    lexicon: Option<&BTreeMap<String, Vec<String>>>,
    item: &str,
) -> Result<Vec<String>, AcousticError> {
    match lexicon {
        None => Ok(grapheme_sequence(text)),
        Some(lexicon) => {
            let mut units = Vec::new();
            for word in transcript_words(text) {
                match lexicon.get(&word) {
                    Some(pronunciation) => units.extend(pronunciation.iter().cloned()),
                    None => {
                        return Err(AcousticError::NotInLexicon {
                            item: item.to_string(),
                            word,
                        })
                    }
                }
            }
            Ok(units)
        }
    }
}

/// Feature matrices (before normalisation) of every utterance of a manifest, unperturbed, cached
/// under `cache` when given. Utterances whose audio fails are returned as errors; the others are
/// unaffected. Each result is a one-element list, the shape [`normalize`] takes.
pub fn manifest_features(
    manifest: &Manifest,
    config: &FeatureConfig,
    cache: Option<&Path>,
    on_file_done: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<UtteranceFeatures>, AcousticError> {
    manifest_features_with(
        manifest,
        config,
        cache,
        &isogloss_audio::read_segments,
        on_file_done,
    )
}

/// [`manifest_features`] with `read` decoding each audio file's segments (what tests replace to
/// make one file fail or panic).
pub fn manifest_features_with(
    manifest: &Manifest,
    config: &FeatureConfig,
    cache: Option<&Path>,
    read: &SegmentReader<'_>,
    on_file_done: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<UtteranceFeatures>, AcousticError> {
    features_of_manifest(
        manifest,
        config,
        cache,
        read,
        &Frontend::plain(),
        on_file_done,
    )
}

/// The features of every utterance of a manifest through each of `frontends`
/// ([`crate::warp_search`]), one matrix per front end in that order. `cache` is only read and
/// written for the plain front end alone.
fn features_of_manifest(
    manifest: &Manifest,
    config: &FeatureConfig,
    cache: Option<&Path>,
    read: &SegmentReader<'_>,
    frontends: &[Frontend],
    on_file_done: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<UtteranceFeatures>, AcousticError> {
    let plain_alone = matches!(frontends, [f] if f.candidate == Candidate::PLAIN);
    let cache = cache.filter(|_| plain_alone);
    let extractor = FeatureExtractor::new(config)?;
    if let Some(dir) = cache {
        std::fs::create_dir_all(dir).map_err(|source| AcousticError::Io {
            path: dir.to_path_buf(),
            source,
        })?;
    }
    // One decoding pass per audio file: group the utterances that cut segments out of it.
    let mut by_file: BTreeMap<&Path, Vec<usize>> = BTreeMap::new();
    for (i, utterance) in manifest.utterances.iter().enumerate() {
        by_file
            .entry(utterance.audio.as_path())
            .or_default()
            .push(i);
    }
    let files: Vec<(&Path, Vec<usize>)> = by_file.into_iter().collect();
    let total = files.len();
    let done = std::sync::atomic::AtomicUsize::new(0);
    let per_file: Vec<Vec<(usize, UtteranceFeatures)>> = files
        .par_iter()
        .map(|(path, indices)| {
            let cached = |i: usize| cache.map(|dir| dir.join(format!("{i}.safetensors")));
            let all_cached = indices
                .iter()
                .all(|&i| cached(i).is_some_and(|p| p.exists()));
            let audio = if all_cached {
                None
            } else {
                let segments: Vec<_> = indices
                    .iter()
                    .map(|&i| manifest.utterances[i].segment())
                    .collect();
                // A panic while decoding one file is that file's error (its utterances are
                // skipped with a warning), not the end of training.
                Some(isogloss_audio::isolated(path, || read(path, &segments)))
            };
            let results = indices
                .iter()
                .enumerate()
                .map(|(k, &i)| {
                    let utterance = &manifest.utterances[i];
                    let item = format!(
                        "{}, line {} ({})",
                        manifest.path.display(),
                        utterance.line,
                        utterance.id
                    );
                    let result = (|| {
                        if let Some(path) = cached(i).filter(|p| p.exists()) {
                            return read_features(&path)
                                .map(|matrix| vec![matrix])
                                .map_err(|e| format!("{item}: cached features unreadable: {e}"));
                        }
                        let samples = match &audio {
                            Some(Ok(segments)) => &segments[k],
                            Some(Err(e)) => return Err(format!("{item}: {e}")),
                            None => return Err(format!("{item}: cache incomplete")),
                        };
                        let mut matrices = Vec::with_capacity(frontends.len());
                        for frontend in frontends {
                            matrices.push(
                                frontend
                                    .features(&extractor, samples)
                                    .map_err(|e| format!("{item}: {e}"))?,
                            );
                        }
                        if let Some(path) = cached(i) {
                            write_features(&path, &matrices[0])
                                .map_err(|e| format!("{item}: cannot cache features: {e}"))?;
                        }
                        Ok(matrices)
                    })();
                    (i, result)
                })
                .collect();
            let finished = done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            on_file_done(finished, total);
            results
        })
        .collect();
    let mut out: Vec<UtteranceFeatures> = (0..manifest.utterances.len())
        .map(|_| Err(String::new()))
        .collect();
    for (i, result) in per_file.into_iter().flatten() {
        out[i] = result;
    }
    Ok(out)
}

/// Normalises utterance features in place as `mode` says; `speakers[i]` is utterance `i`'s
/// speaker. Statistics come from the first matrix of each utterance (the unperturbed one).
pub fn normalize(
    features: &mut [Vec<Array2<f32>>],
    speakers: &[&str],
    config: &FeatureConfig,
) -> Result<(), AcousticError> {
    match config.cmvn {
        CmvnMode::None => Ok(()),
        CmvnMode::Utterance => {
            for (variants, speaker) in features.iter_mut().zip(speakers) {
                if let Some(first) = variants.first() {
                    let cmvn = Cmvn::from_features(first, config.unit_variance, speaker)?;
                    for matrix in variants.iter_mut() {
                        cmvn.apply(matrix, speaker)?;
                    }
                }
            }
            Ok(())
        }
        CmvnMode::Speaker => {
            let mut stats = SpeakerCmvnStats::new(config.dims());
            for (variants, speaker) in features.iter().zip(speakers) {
                if let Some(first) = variants.first() {
                    stats.accumulate(speaker, first.view())?;
                }
            }
            let by_speaker = stats.finish(config.unit_variance)?;
            for (variants, speaker) in features.iter_mut().zip(speakers) {
                if let Some(cmvn) = by_speaker.get(*speaker) {
                    for matrix in variants.iter_mut() {
                        cmvn.apply(matrix, speaker)?;
                    }
                }
            }
            Ok(())
        }
    }
}

fn append_log(path: &Path, value: &serde_json::Value) -> Result<(), AcousticError> {
    let io = |source| AcousticError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .map_err(io)?;
    writeln!(file, "{value}").map_err(io)
}

struct Split {
    utterances: Vec<PreparedUtterance>,
    failed: Vec<String>,
}

/// Unit labels of every utterance of a manifest (`None` where the transcript cannot be encoded;
/// with `strict` that is an error instead).
fn encode_labels(
    manifest: &Manifest,
    column: usize,
    units: &UnitInventory,
    lexicon: Option<&BTreeMap<String, Vec<String>>>,
    strict: bool,
    failed: &mut Vec<String>,
    on_event: &mut dyn FnMut(&PipelineEvent),
) -> Result<Vec<Option<Vec<u32>>>, AcousticError> {
    let mut labels = Vec::with_capacity(manifest.utterances.len());
    for utterance in &manifest.utterances {
        let item = format!(
            "{}, line {} ({})",
            manifest.path.display(),
            utterance.line,
            utterance.id
        );
        let text = utterance
            .transcripts
            .get(column)
            .map(String::as_str)
            .unwrap_or("");
        let encoded =
            unit_names(text, lexicon, &item).and_then(|names| units.encode(&names, &item));
        match encoded {
            Ok(sequence) => labels.push(Some(sequence)),
            Err(e) if strict => return Err(e),
            Err(e) => {
                on_event(&PipelineEvent::Warning(format!("skipped: {e}")));
                failed.push(e.to_string());
                labels.push(None);
            }
        }
    }
    Ok(labels)
}

/// Unperturbed, normalised features of a (dev) manifest, cached under `cache`.
#[allow(clippy::too_many_arguments)]
fn prepare_split(
    name: &'static str,
    manifest: &Manifest,
    column: usize,
    units: &UnitInventory,
    lexicon: Option<&BTreeMap<String, Vec<String>>>,
    config: &ModelConfig,
    cache: &Path,
    on_event: &mut dyn FnMut(&PipelineEvent),
) -> Result<Split, AcousticError> {
    let mut failed = Vec::new();
    let labels = encode_labels(
        manifest,
        column,
        units,
        lexicon,
        false,
        &mut failed,
        on_event,
    )?;
    let progress = std::sync::Mutex::new(Vec::<(usize, usize)>::new());
    let mut features =
        manifest_features(manifest, &config.features, Some(cache), &|done, total| {
            if let Ok(mut p) = progress.lock() {
                p.push((done, total));
            }
        })?;
    if let Ok(p) = progress.lock() {
        if let Some(&(done, total)) = p.iter().max() {
            on_event(&PipelineEvent::Features {
                split: name,
                done,
                total,
            });
        }
    }
    let mut kept_features = Vec::new();
    let mut kept = Vec::new();
    for (i, (result, label)) in features.drain(..).zip(labels).enumerate() {
        match (result, label) {
            (Ok(variants), Some(label)) => {
                kept_features.push(variants);
                kept.push((i, label));
            }
            (Err(message), Some(_)) => {
                on_event(&PipelineEvent::Warning(format!("skipped: {message}")));
                failed.push(message);
            }
            (_, None) => {}
        }
    }
    let speakers: Vec<&str> = kept
        .iter()
        .map(|(i, _)| manifest.utterances[*i].speaker.as_str())
        .collect();
    normalize(&mut kept_features, &speakers, &config.features)?;
    let utterances = kept
        .into_iter()
        .zip(kept_features)
        .map(|((i, labels), variants)| PreparedUtterance {
            id: manifest.utterances[i].id.clone(),
            variants,
            labels,
        })
        .collect();
    Ok(Split { utterances, failed })
}

/// The training set: audio decoded into the PCM cache, labels encoded, utterances whose labels
/// cannot fit their frames skipped, per-speaker statistics when the front end wants them.
struct TrainingSet {
    set: AudioSet,
    /// The manifest row of each utterance of `set`, in its order.
    rows: Vec<usize>,
    failed: Vec<String>,
    skipped: Vec<(String, usize, usize)>,
}

#[allow(clippy::too_many_arguments)]
fn prepare_training_set(
    manifest: &Manifest,
    digest: &str,
    column: usize,
    units: &UnitInventory,
    lexicon: Option<&BTreeMap<String, Vec<String>>>,
    config: &ModelConfig,
    trainer: &Trainer,
    pcm_cache: &Path,
    on_event: &mut dyn FnMut(&PipelineEvent),
) -> Result<TrainingSet, AcousticError> {
    let mut failed = Vec::new();
    let labels = encode_labels(
        manifest,
        column,
        units,
        lexicon,
        true,
        &mut failed,
        on_event,
    )?;
    let progress = std::sync::Mutex::new((0usize, 0usize));
    let (store, failures) =
        PcmStore::open_or_build(pcm_cache, manifest, digest, &|done, total| {
            if let Ok(mut p) = progress.lock() {
                *p = (done, total);
            }
        })?;
    if let Ok(&(done, total)) = progress.lock().as_deref() {
        on_event(&PipelineEvent::Features {
            split: "train",
            done,
            total,
        });
    }
    for (_, message) in failures {
        on_event(&PipelineEvent::Warning(format!("skipped: {message}")));
        failed.push(message);
    }
    let extractor = FeatureExtractor::new(&config.features)?;
    let mut utterances = Vec::new();
    let mut skipped = Vec::new();
    for (row, label) in labels.into_iter().enumerate() {
        let (Some(labels), Some(samples)) = (label, store.sample_count(row)) else {
            continue;
        };
        let utterance = &manifest.utterances[row];
        let frames = extractor.config().frame_count(samples);
        if !trainer.fits(frames, &labels) {
            let needed = crate::ctc::min_frames_for(&labels);
            skipped.push((
                utterance.id.clone(),
                trainer.network().output_frames(frames),
                needed,
            ));
            continue;
        }
        utterances.push(AudioUtterance {
            id: utterance.id.clone(),
            row,
            speaker: utterance.speaker.clone(),
            labels,
            frames,
        });
    }
    let mut speaker_cmvn = BTreeMap::new();
    if config.features.cmvn == CmvnMode::Speaker {
        let clean: Vec<Array2<f32>> = utterances
            .par_iter()
            .map(|u| {
                let samples = store.samples(u.row)?.unwrap_or_default();
                Ok(extractor.extract(&samples))
            })
            .collect::<Result<_, AcousticError>>()?;
        let mut stats = SpeakerCmvnStats::new(config.features.dims());
        for (u, matrix) in utterances.iter().zip(&clean) {
            stats.accumulate(&u.speaker, matrix.view())?;
        }
        speaker_cmvn = stats.finish(config.features.unit_variance)?;
    }
    let augmentation = &config.augmentation;
    let masks = &augmentation.masks;
    let perturbation = Perturbation {
        speed_factors: augmentation.speed_factors.clone(),
        waveform: if augmentation.has_waveform_steps() {
            Some(
                isogloss_audio::augment::Augmenter::new(augmentation.waveform())
                    .map_err(|e| AcousticError::Config(e.to_string()))?,
            )
        } else {
            None
        },
        vtlp: augmentation.vtlp.clone(),
        masks: (masks.time_masks > 0 || masks.frequency_masks > 0)
            .then(|| (masks.clone(), config.features.delta_order() + 1)),
    };
    let rows = utterances.iter().map(|u| u.row).collect();
    let set = AudioSet::new(
        store,
        utterances,
        &config.features,
        speaker_cmvn,
        perturbation,
    )?;
    Ok(TrainingSet {
        set,
        rows,
        failed,
        skipped,
    })
}

/// The rows of `manifest` at `rows` (in that order), as a manifest of their own: a rank's share.
fn sub_manifest(manifest: &Manifest, rows: &[usize]) -> Manifest {
    Manifest {
        path: manifest.path.clone(),
        transcript_columns: manifest.transcript_columns.clone(),
        utterances: rows
            .iter()
            .map(|&i| manifest.utterances[i].clone())
            .collect(),
    }
}

/// Seconds of audio of every row of `manifest`, from its `start`/`end` or else the audio file's
/// header (0 where the header cannot be read: the rank that decodes the row reports it). Each
/// rank reads the headers of every `size`-th row and the ranks sum the lists.
fn estimated_seconds(
    manifest: &Manifest,
    collective: &dyn Collective,
) -> Result<Vec<f64>, AcousticError> {
    let (rank, size) = (collective.rank(), collective.size());
    let mine: Vec<usize> = (rank..manifest.utterances.len()).step_by(size).collect();
    let files: std::collections::BTreeSet<&Path> = mine
        .iter()
        .map(|&i| &manifest.utterances[i])
        .filter(|u| u.end.is_none())
        .map(|u| u.audio.as_path())
        .collect();
    let files: Vec<&Path> = files.into_iter().collect();
    let durations: BTreeMap<&Path, f64> = files
        .par_iter()
        .map(|&path| {
            let seconds = isogloss_audio::probe(path).map_or(0.0, |info| info.duration_seconds);
            (path, seconds)
        })
        .collect();
    let mut seconds = vec![0f64; manifest.utterances.len()];
    for i in mine {
        let utterance = &manifest.utterances[i];
        let start = utterance.start.unwrap_or(0.0);
        let end = utterance
            .end
            .or_else(|| durations.get(utterance.audio.as_path()).copied())
            .unwrap_or(start);
        seconds[i] = (end - start).max(0.0);
    }
    collective.sum_f64("the lengths of the training manifest's rows", &mut seconds)?;
    Ok(seconds)
}

/// The model a warm start reads, checked against the run's configuration: the network and the
/// front end must be the same (the training settings may differ).
fn start_model(dir: &Path, config: &ModelConfig) -> Result<AcousticModel, AcousticError> {
    let model = AcousticModel::load(dir)?;
    let description = model.description();
    let differs = if description.architecture != config.model {
        Some("[model] (the network)")
    } else if description.features != config.features {
        Some("[features] (the front end)")
    } else {
        None
    };
    if let Some(table) = differs {
        return Err(AcousticError::Model {
            path: dir.join("model.toml"),
            problem: format!(
                "its {table} differs from this run's configuration: a warm start needs the same; pass the configuration it was trained with"
            ),
        });
    }
    Ok(model)
}

/// Trains (or resumes training) a model as `options` says, writing the model directory, and
/// after every epoch a checkpoint, a line of `training.jsonl` and the training curve
/// `training-curve.svg` drawn from it.
pub fn train(
    options: &TrainOptions,
    on_event: &mut dyn FnMut(&PipelineEvent),
) -> Result<TrainSummary, AcousticError> {
    train_with(options, Arc::new(SingleProcess), on_event)
}

/// [`train`] as one rank of a data-parallel run over `collective` (every rank calls it with
/// the same options). Each rank decodes and caches only its share of the training manifest
/// (balanced by length, [`balanced_share`]; `cache/<key>/train-R-of-N.pcm`) and of the dev
/// manifest (every N-th row; `cache/<key>/dev-R-of-N/`); rank 0 alone writes the checkpoint,
/// the log, the curve and the model. With one rank this is [`train`].
pub fn train_with(
    options: &TrainOptions,
    collective: Arc<dyn Collective>,
    on_event: &mut dyn FnMut(&PipelineEvent),
) -> Result<TrainSummary, AcousticError> {
    let (rank, size) = (collective.rank(), collective.size());
    let distributed = size > 1;
    let writer = rank == 0;
    let (train_manifest, train_column) = read_manifest(&options.train_manifest, &options.column)?;
    let (dev_manifest, dev_column) = read_manifest(&options.dev_manifest, &options.column)?;
    let checkpoint = checkpoint_path(&options.out);
    let lexicon: Option<BTreeMap<String, Vec<String>>> = match &options.lexicon {
        Some(path) => {
            let lexicon = Lexicon::read(path)?;
            let mut first = BTreeMap::new();
            for (word, units) in lexicon.entries {
                first.entry(word).or_insert(units);
            }
            Some(first)
        }
        None => None,
    };
    let mut trainer = if options.resume {
        if !checkpoint.exists() {
            return Err(AcousticError::Input {
                path: checkpoint,
                problem: "--resume was given but there is no checkpoint to resume from".into(),
            });
        }
        Trainer::load_checkpoint(&checkpoint)?
    } else {
        if checkpoint.exists() {
            return Err(AcousticError::Input {
                path: checkpoint,
                problem: "a training run already wrote here; pass --resume to continue it or choose another --out".into(),
            });
        }
        let start = options
            .start_from
            .as_deref()
            .map(|dir| start_model(dir, &options.config))
            .transpose()?;
        let units = match (&start, &lexicon) {
            (Some(start), _) => start.inventory().clone(),
            (None, Some(lexicon)) => UnitInventory::phones(lexicon.values().flatten().cloned()),
            (None, None) => UnitInventory::graphemes(train_manifest.utterances.iter().map(|u| {
                u.transcripts
                    .get(train_column)
                    .map(String::as_str)
                    .unwrap_or("")
            })),
        };
        let mut trainer = Trainer::new(
            options.config.clone(),
            units,
            options.config.input_dims(),
            options.seed,
        )?;
        if let Some(dir) = &options.start_from {
            trainer.load_model_weights(&dir.join("model.safetensors"))?;
        }
        trainer
    };
    if let Some(epochs) = options.epochs {
        trainer.set_epochs(epochs);
    }
    trainer.set_collective(Arc::clone(&collective));
    trainer.set_prefetch(options.prefetch);
    let config = trainer.config().clone();
    if distributed {
        let refused = if config.features.cmvn == CmvnMode::Speaker {
            Some("[features] cmvn = \"speaker\" (its statistics span the ranks' shares)")
        } else if config.speaker_vectors.is_some() {
            Some("[speaker_vectors] (the extractor is trained on the whole training set)")
        } else {
            None
        };
        if let Some(what) = refused {
            return Err(AcousticError::Collective(format!(
                "{what} is not supported with more than one rank yet; train it as one process"
            )));
        }
    }
    let seed = trainer.progress().seed;
    if trainer.units().kind == UnitKind::Phones && lexicon.is_none() {
        return Err(AcousticError::Config(
            "this run was started with phone units: pass the same --lexicon again".into(),
        ));
    }
    let train_hash = sha256_file(&options.train_manifest)?;
    let dev_hash = sha256_file(&options.dev_manifest)?;
    let train_digest = manifest_digest(&options.train_manifest, &train_manifest)?;
    let dev_digest = manifest_digest(&options.dev_manifest, &dev_manifest)?;
    let key_text = format!(
        "{train_digest}\n{dev_digest}\n{}",
        toml::to_string(&config.features).unwrap_or_default(),
    );
    let key = format!("{:x}", Sha256::digest(key_text.as_bytes()));
    let cache = options.out.join("cache").join(&key[..16]);
    let units = trainer.units().clone();
    // A rank's share of each manifest, and where its caches live.
    let (share_rows, train_share, dev_share, pcm_cache, dev_cache, share_digest) = if distributed {
        let seconds = estimated_seconds(&train_manifest, collective.as_ref())?;
        let share_rows = balanced_share(&seconds, rank, size);
        let dev_rows: Vec<usize> = (rank..dev_manifest.utterances.len())
            .step_by(size)
            .collect();
        (
            share_rows.clone(),
            Cow::Owned(sub_manifest(&train_manifest, &share_rows)),
            Cow::Owned(sub_manifest(&dev_manifest, &dev_rows)),
            cache.join(format!("train-{rank}-of-{size}.pcm")),
            cache.join(format!("dev-{rank}-of-{size}")),
            format!("{train_digest}:{rank}/{size}"),
        )
    } else {
        (
            Vec::new(),
            Cow::Borrowed(&train_manifest),
            Cow::Borrowed(&dev_manifest),
            cache.join("train.pcm"),
            cache.join("dev"),
            train_digest.clone(),
        )
    };
    let mut training_set = prepare_training_set(
        &train_share,
        &share_digest,
        train_column,
        &units,
        lexicon.as_ref(),
        &config,
        &trainer,
        &pcm_cache,
        on_event,
    )?;
    let mut dev_split = prepare_split(
        "dev",
        &dev_share,
        dev_column,
        &units,
        lexicon.as_ref(),
        &config,
        &dev_cache,
        on_event,
    )?;
    if let Some(vectors) = &config.speaker_vectors {
        let started = std::time::Instant::now();
        let cache_dir = cache.join("ivector");
        let dims = config.features.dims();
        let outcome = match cached_extractor(&vectors.extractor, dims, &cache_dir) {
            Some(extractor) => ExtractorOutcome {
                extractor,
                cached: true,
                skipped: Vec::new(),
            },
            None => train_extractor(
                &vectors.extractor,
                dims,
                &cache_dir,
                &training_set.set.clean_training_features()?,
                &mut |progress| on_event(&PipelineEvent::SpeakerVectors(progress.clone())),
            )?,
        };
        if outcome.cached {
            on_event(&PipelineEvent::SpeakerVectorsCached);
        }
        append_log(
            &options.out.join("training.jsonl"),
            &serde_json::json!({
                "event": "speaker_vectors",
                "cached": outcome.cached,
                "seconds": started.elapsed().as_secs_f64(),
                "skipped_utterances": outcome.skipped.len(),
            }),
        )?;
        for message in &outcome.skipped {
            on_event(&PipelineEvent::Warning(format!(
                "i-vector extractor training left out {message}"
            )));
        }
        outcome.extractor.save(&options.out)?;
        let mut kept = Vec::with_capacity(dev_split.utterances.len());
        for mut utterance in dev_split.utterances.drain(..) {
            let item = format!("{} ({})", options.dev_manifest.display(), utterance.id);
            let appended: Result<Vec<Array2<f32>>, AcousticError> = utterance
                .variants
                .iter()
                .map(|matrix| with_vectors(&outcome.extractor, &item, matrix.view()))
                .collect();
            match appended {
                Ok(variants) => {
                    utterance.variants = variants;
                    kept.push(utterance);
                }
                Err(e) => {
                    on_event(&PipelineEvent::Warning(format!("skipped: {e}")));
                    dev_split.failed.push(e.to_string());
                }
            }
        }
        dev_split.utterances = kept;
        training_set.set.set_speaker_vectors(outcome.extractor);
    }
    for (id, available, needed) in &training_set.skipped {
        on_event(&PipelineEvent::Warning(format!(
            "skipped training utterance {id}: {needed} labels need {needed} output frames at least, it has {available}"
        )));
    }
    let dev_admission = trainer.admit(dev_split.utterances);
    for (id, available, needed) in &dev_admission.skipped {
        on_event(&PipelineEvent::Warning(format!(
            "skipped dev utterance {id}: needs {needed} output frames, has {available}"
        )));
    }
    // The whole set's counts (a rank may hold no dev utterance).
    let mut counts = [
        dev_admission.kept.len() as f64,
        training_set.skipped.len() as f64,
        (training_set.failed.len() + dev_split.failed.len()) as f64,
    ];
    if distributed {
        collective.sum_f64("the counts of usable utterances", &mut counts)?;
    }
    let [dev_count, skipped_count, failed_count] = counts.map(|c| c as usize);
    if dev_count == 0 {
        return Err(AcousticError::Input {
            path: options.dev_manifest.clone(),
            problem: "no dev utterance is usable (all failed or were skipped)".into(),
        });
    }
    let sharded;
    let train_set: &dyn TrainingData = if distributed {
        // Every rank learns every admitted row's length; the whole set is those rows in
        // manifest order, as a single process admits them.
        let mut frames = vec![0f64; train_manifest.utterances.len()];
        for (k, &row) in training_set.rows.iter().enumerate() {
            frames[share_rows[row]] = training_set.set.frames(k) as f64;
        }
        collective.sum_f64(
            "the lengths of the admitted training utterances",
            &mut frames,
        )?;
        let owner: BTreeMap<usize, usize> = training_set
            .rows
            .iter()
            .enumerate()
            .map(|(k, &row)| (share_rows[row], k))
            .collect();
        let admitted: Vec<usize> = (0..frames.len()).filter(|&r| frames[r] > 0.0).collect();
        sharded = ShardedSet::new(
            &training_set.set,
            admitted
                .iter()
                .map(|&r| train_manifest.utterances[r].id.clone())
                .collect(),
            admitted.iter().map(|&r| frames[r] as usize).collect(),
            admitted.iter().map(|r| owner.get(r).copied()).collect(),
        )?;
        &sharded
    } else {
        &training_set.set
    };
    if train_set.is_empty() {
        return Err(AcousticError::Input {
            path: options.train_manifest.clone(),
            problem: "no training utterance is usable (all failed or were skipped)".into(),
        });
    }
    let log_path = options.out.join("training.jsonl");
    let requested = config.training.matmul_precision;
    let precision = trainer.matmul_precision();
    if requested != precision && writer {
        on_event(&PipelineEvent::Warning(format!(
            "[training] matmul_precision = \"{}\" needs a CPU with AVX-512 BF16; this one lacks it, so the products run in {}",
            requested.name(),
            precision.name()
        )));
    }
    if writer {
        append_log(
            &log_path,
            &serde_json::json!({
                "event": if options.resume { "resume" } else { "start" },
                "epochs_done": trainer.progress().epochs_done,
                "train_utterances": train_set.len(),
                "skipped_utterances": skipped_count,
                "failed_utterances": failed_count,
                "dev_utterances": dev_count,
                "units": units.len(),
                "parameters": config.model.parameter_count(config.network_input(), units.len()),
                "seed": seed,
                "minutes": options.minutes,
                "ranks": size,
                "prefetch": options.prefetch,
                "matmul_precision": precision.name(),
                "matmul_precision_requested": requested.name(),
            }),
        )?;
    }
    let mut summary = TrainSummary {
        skipped_utterances: training_set.skipped.clone(),
        failed_utterances: training_set
            .failed
            .iter()
            .chain(&dev_split.failed)
            .cloned()
            .collect(),
        ..TrainSummary::default()
    };
    if let Some(minutes) = options.minutes {
        let budget = std::time::Duration::from_secs_f64(minutes * 60.0);
        trainer.set_deadline(Some(std::time::Instant::now() + budget));
    }
    let mut log_error = None;
    while trainer.keep_going()? {
        let record = trainer.run_epoch(train_set, &dev_admission.kept, &mut |event| {
            if let (true, TrainingEvent::BatchSkipped { utterances, .. }) = (writer, event) {
                let line = serde_json::json!({"event": "batch_skipped", "reason": "non-finite loss or gradient", "utterances": utterances});
                if let Err(e) = append_log(&log_path, &line) {
                    log_error = Some(e);
                }
            }
            on_event(&PipelineEvent::Training(event.clone()));
        })?;
        if let Some(e) = log_error.take() {
            return Err(e);
        }
        if writer {
            trainer.save_checkpoint(&checkpoint)?;
        }
        if record.saved {
            let description = ModelDescription {
                format: MODEL_FORMAT,
                units: units.clone(),
                features: config.features.clone(),
                architecture: config.model.clone(),
                provenance: Provenance {
                    train_manifest_sha256: train_hash.clone(),
                    dev_manifest_sha256: dev_hash.clone(),
                    column: options.column.clone(),
                    epochs: record.epoch,
                    dev_loss: record
                        .average
                        .as_ref()
                        .map_or(record.dev_loss, |a| a.dev_loss),
                    dev_unit_error_rate: record
                        .average
                        .as_ref()
                        .map_or(record.dev_unit_error_rate, |a| a.dev_unit_error_rate),
                    train_utterances: train_set.len(),
                    skipped_utterances: skipped_count,
                    seed,
                    written_by: format!("isogloss-acoustic {}", env!("CARGO_PKG_VERSION")),
                    updates: trainer.updates(),
                    minutes: options.minutes,
                    started_from: options
                        .start_from
                        .as_ref()
                        .map(|dir| dir.display().to_string()),
                    averaged_epochs: record.average.as_ref().map_or(0, |a| a.epochs),
                },
                training: Some(config.training.clone()),
                augmentation: Some(config.augmentation.clone()),
                self_training: Vec::new(),
                speaker_vectors: config.speaker_vectors.clone(),
                inference: crate::warp_search::Inference::from_training(
                    &config.augmentation.vtlp,
                    config.training.matmul_precision,
                ),
            };
            if writer {
                trainer.with_kept_weights(|trainer| {
                    AcousticModel::save(&options.out, &description, &trainer.model_tensors())
                })?;
            }
            summary.kept = Some(record.clone());
        }
        if !writer {
            continue;
        }
        let mut line = serde_json::to_value(&record)
            .map_err(|e| AcousticError::Config(format!("epoch record does not serialise: {e}")))?;
        line["event"] = "epoch".into();
        append_log(&log_path, &line)?;
        // The curve is a view of the log: failing to draw it costs the user a picture, not the
        // run.
        let curve = crate::log::read_epochs(&log_path).and_then(|epochs| {
            let path = options.out.join(crate::log::CURVE_FILE);
            let name = options.out.file_name().map_or_else(
                || options.out.display().to_string(),
                |n| n.to_string_lossy().into_owned(),
            );
            crate::io::write_atomically(
                &path,
                crate::log::training_curve(&name, &epochs).as_bytes(),
            )
        });
        if let Err(e) = curve {
            on_event(&PipelineEvent::Warning(format!(
                "training curve not drawn: {e}"
            )));
        }
    }
    summary.epochs_done = trainer.progress().epochs_done;
    summary.stopped_early =
        options.minutes.is_none() && summary.epochs_done < config.training.epochs;
    if summary.kept.is_none() {
        // Nothing was written in this call (a resumed run with no epoch left): the epoch the
        // directory already holds. Checkpoints from before `saved` existed record `improved`.
        summary.kept = trainer
            .progress()
            .history
            .iter()
            .rfind(|r| r.saved || r.improved)
            .cloned();
    }
    Ok(summary)
}

/// One utterance's posteriors as the decoder chooses from them: one `[frames, units]` matrix
/// per reading, the most confident first.
pub type Readings = Vec<Array2<f32>>;

/// Log-posteriors `[frames, units]` of every utterance of a manifest, normalised the way the
/// model was trained; a failed utterance gives an error message and the others carry on. With a
/// warp search (`[inference]`, [`crate::warp_search`]) each utterance's features are computed
/// through every candidate, each normalised as the model says, and the posteriors the decoder
/// is to choose from are kept, most confident first ([`crate::warp_search::arrange`]); without
/// one, the unwarped posteriors alone. Every utterance that succeeds has at least one.
pub fn manifest_posteriors(
    model: &AcousticModel,
    manifest: &Manifest,
    on_file_done: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<Result<Readings, String>>, AcousticError> {
    let config = model.feature_config();
    let (frontends, choose) = match model.inference() {
        Some(inference) => (inference.frontends(config.sample_rate)?, inference.choose),
        None => (Frontend::plain(), Default::default()),
    };
    let raw = features_of_manifest(
        manifest,
        config,
        None,
        &isogloss_audio::read_segments,
        &frontends,
        on_file_done,
    )?;
    let mut ok_indices = Vec::new();
    // by_warp[k][j]: the features of the j-th readable utterance through front end k.
    let mut by_warp: Vec<Vec<Vec<Array2<f32>>>> = vec![Vec::new(); frontends.len()];
    let mut results: Vec<Result<Readings, String>> = Vec::with_capacity(raw.len());
    for (i, result) in raw.into_iter().enumerate() {
        match result {
            Ok(matrices) => {
                ok_indices.push(i);
                for (k, matrix) in matrices.into_iter().enumerate() {
                    by_warp[k].push(vec![matrix]);
                }
                results.push(Ok(Vec::new()));
            }
            Err(message) => results.push(Err(message)),
        }
    }
    let speakers: Vec<&str> = ok_indices
        .iter()
        .map(|&i| manifest.utterances[i].speaker.as_str())
        .collect();
    for features in by_warp.iter_mut() {
        normalize(features, &speakers, config)?;
    }
    let posteriors: Vec<Result<Readings, String>> = ok_indices
        .par_iter()
        .enumerate()
        .map(|(j, &i)| {
            let u = &manifest.utterances[i];
            let mut candidates = Vec::with_capacity(by_warp.len());
            for features in &by_warp {
                let posteriors = model.log_posteriors(&features[j][0]).map_err(|e| {
                    format!(
                        "{}, line {} ({}): {e}",
                        manifest.path.display(),
                        u.line,
                        u.id
                    )
                })?;
                candidates.push((posteriors, ()));
            }
            Ok(crate::warp_search::arrange(choose, candidates)
                .into_iter()
                .map(|(posteriors, ())| posteriors)
                .collect())
        })
        .collect();
    for (i, p) in ok_indices.into_iter().zip(posteriors) {
        results[i] = p;
    }
    Ok(results)
}

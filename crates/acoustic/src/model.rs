//! The model directory (`model.safetensors` + `model.toml`) and inference.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::path::Path;

use candle_core::{Device, Tensor, Var};
use ndarray::Array2;
use serde::{Deserialize, Serialize};

use isogloss_speaker::{IvectorExtractor, EXTRACTOR_DESCRIPTION};

use crate::config::{MatmulPrecision, TdnnConfig};
use crate::io::{serialize_tensors, write_atomically};
use crate::tdnn::{var_builder, Tdnn};
use crate::units::UnitInventory;
use crate::warp_search::{Candidate, Frontend};
use crate::AcousticError;

/// Feature settings recorded in (and required by) the model; the features crate's type.
pub use isogloss_features::FeatureConfig;

/// Version of the `model.toml` layout written by this crate.
pub const MODEL_FORMAT: u32 = 1;

/// Where a model came from.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// SHA-256 of the training manifest file.
    pub train_manifest_sha256: String,
    /// SHA-256 of the dev manifest file.
    pub dev_manifest_sha256: String,
    /// Transcript column the units were taken from.
    pub column: String,
    /// Epochs trained when these weights were saved.
    pub epochs: usize,
    /// Per-frame dev CTC loss of these weights.
    pub dev_loss: f64,
    /// Greedy dev unit error rate of these weights.
    pub dev_unit_error_rate: f64,
    /// Training utterances used and skipped.
    pub train_utterances: usize,
    /// Training utterances skipped because their labels did not fit.
    pub skipped_utterances: usize,
    /// Seed of the run.
    pub seed: u64,
    /// Program that wrote the model.
    pub written_by: String,
    /// Optimizer updates done when these weights were saved.
    #[serde(default)]
    pub updates: u64,
    /// The wall-clock budget of the run in minutes (`--minutes`), if it had one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub minutes: Option<f64>,
    /// The model directory whose weights the run started from (`train --from`), if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub started_from: Option<String>,
    /// Epochs whose weights these are the mean of (`[training] average_share`; 0 or absent:
    /// one epoch's weights). `dev_loss` and `dev_unit_error_rate` are then the mean's.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub averaged_epochs: usize,
}

/// Serde's test for a count left at 0 (not written out).
fn is_zero(value: &usize) -> bool {
    *value == 0
}

/// One round of self-training (`isogloss train --untranscribed`), as `model.toml` and the
/// training log record it (docs/training.md, "Self-training").
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct SelfTrainingRound {
    /// Round number, from 1.
    pub round: usize,
    /// How the threshold was chosen, in words.
    pub rule: String,
    /// Segments with a confidence at least this were kept; absent: the rule kept nothing.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub threshold: Option<f64>,
    /// Untranscribed segments transcribed in the round.
    pub offered_segments: usize,
    /// Their audio, hours.
    pub offered_hours: f64,
    /// Segments kept as pseudo-labels.
    pub kept_segments: usize,
    /// Their audio, hours.
    pub kept_hours: f64,
    /// Dev segments at or above the threshold.
    pub dev_kept_segments: usize,
    /// WER of those dev segments (absent when none).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dev_kept_wer: Option<f64>,
    /// Dev WER of the model that made the pseudo-labels (the previous round's; absent when dev
    /// has no reference words).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dev_wer_before: Option<f64>,
    /// Dev WER of the model this round trained (absent until measured).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dev_wer_after: Option<f64>,
    /// Training utterances of the round: transcribed plus pseudo-labelled.
    pub train_utterances: usize,
    /// Why nothing was kept, when nothing was (training then went on with the transcribed
    /// data alone).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    /// Median segment confidence of dev under the labelling model.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dev_median_confidence: Option<f64>,
    /// Median segment confidence of the pool under the labelling model.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pool_median_confidence: Option<f64>,
    /// Set when the pool's median confidence is below dev's lower quartile: the pool does not
    /// sound like dev, and the rule's dev WER may not hold for the kept segments.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warning: Option<String>,
    /// The peak learning rate the round trained at (`--round-rate-share` × the
    /// configuration's; absent in records written before it was recorded).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub learning_rate: Option<f64>,
}

/// `model.toml`: everything decoding needs besides the weights.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelDescription {
    /// [`MODEL_FORMAT`].
    pub format: u32,
    /// Unit inventory, blank first.
    pub units: UnitInventory,
    /// Front end, including how features are normalised (`cmvn`).
    pub features: FeatureConfig,
    /// The network.
    pub architecture: TdnnConfig,
    /// Where the model came from.
    pub provenance: Provenance,
    /// How it was trained (absent in models of the previous release).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub training: Option<crate::config::TrainingConfig>,
    /// How its training utterances were perturbed (absent in models of the previous release).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub augmentation: Option<crate::config::Augmentation>,
    /// The rounds of self-training that made the model, in order (absent: none).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub self_training: Vec<SelfTrainingRound>,
    /// The speaker vectors the network reads beside the features; the extractor itself is
    /// `ivector.toml` + `ivector.safetensors` in the model directory. Absent: none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speaker_vectors: Option<crate::config::SpeakerVectors>,
    /// How to decode it: the test-time warp search (absent: the unwarped front end alone).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inference: Option<crate::warp_search::Inference>,
}

impl ModelDescription {
    /// Dimensions of each frame the network reads: the features, plus the speaker vector.
    pub fn input_dims(&self) -> usize {
        self.features.dims()
            + self
                .speaker_vectors
                .as_ref()
                .map_or(0, crate::config::SpeakerVectors::dimension)
    }

    /// What the network reads: [`ModelDescription::input_dims`] per frame, and the speaker
    /// vector at every later hidden layer when the vectors enter every layer.
    pub fn network_input(&self) -> crate::config::NetworkInput {
        match &self.speaker_vectors {
            Some(vectors) => vectors.network_input(self.features.dims()),
            None => self.features.dims().into(),
        }
    }
}

/// Reads a `model.toml` of the previous release: its keys are read by their old spellings
/// already (serde aliases); this renames its blank unit and returns one deprecation notice per
/// old spelling, for the caller to print. Such a model still decodes exactly as before.
fn upgrade_previous_release(description: &mut ModelDescription, text: &str) -> Vec<String> {
    let mut notices = Vec::new();
    if let Ok(table) = text.parse::<toml::Table>() {
        if let Some(features) = table.get("features").and_then(toml::Value::as_table) {
            notices.extend(isogloss_features::deprecated_spellings(features));
        }
        let architecture = table.get("architecture").and_then(toml::Value::as_table);
        notices.extend(crate::config::deprecated_layer_spellings(
            architecture.and_then(|a| a.get("layers")),
        ));
    }
    if let Some(first) = description.units.units.first_mut() {
        if first.as_str() == crate::units::PREVIOUS_BLANK {
            *first = crate::units::BLANK.to_string();
            notices.push(format!(
                "the blank unit `{}` is deprecated; write `{}`",
                crate::units::PREVIOUS_BLANK,
                crate::units::BLANK
            ));
        }
    }
    if !notices.is_empty() {
        notices.push("the model reads as before; save it again to update it".into());
    }
    notices
}

/// The number format of the network's products at inference: `[inference] matmul_precision`
/// where this CPU runs it, else f32.
fn inference_precision(description: &ModelDescription) -> MatmulPrecision {
    description
        .inference
        .as_ref()
        .map_or(MatmulPrecision::F32, |search| {
            search.matmul_precision.supported()
        })
}

/// A trained model ready for inference.
pub struct AcousticModel {
    description: ModelDescription,
    network: Tdnn,
    speaker_vectors: Option<IvectorExtractor>,
}

impl AcousticModel {
    /// Writes `model.toml` and `model.safetensors` into `dir` (created if needed), atomically.
    /// `tensors` are the parameters and, with batch normalisation, the running statistics
    /// ([`crate::train::Trainer::model_tensors`]).
    pub fn save(
        dir: &Path,
        description: &ModelDescription,
        tensors: &BTreeMap<String, Var>,
    ) -> Result<(), AcousticError> {
        std::fs::create_dir_all(dir).map_err(|source| AcousticError::Io {
            path: dir.to_path_buf(),
            source,
        })?;
        let mut named = Vec::with_capacity(tensors.len());
        for (name, var) in tensors {
            let values: Vec<f32> = var.as_tensor().flatten_all()?.to_vec1()?;
            named.push((name.clone(), var.dims().to_vec(), values));
        }
        write_atomically(
            &dir.join("model.safetensors"),
            &serialize_tensors(&named, None)?,
        )?;
        let text = toml::to_string_pretty(description).map_err(|e| {
            AcousticError::Config(format!("model description does not serialise: {e}"))
        })?;
        write_atomically(&dir.join("model.toml"), text.as_bytes())
    }

    /// Loads a model directory.
    pub fn load(dir: &Path) -> Result<AcousticModel, AcousticError> {
        let toml_path = dir.join("model.toml");
        let text = std::fs::read_to_string(&toml_path).map_err(|source| AcousticError::Io {
            path: toml_path.clone(),
            source,
        })?;
        let mut description: ModelDescription =
            toml::from_str(&text).map_err(|e| AcousticError::Model {
                path: toml_path.clone(),
                problem: e.to_string(),
            })?;
        for notice in upgrade_previous_release(&mut description, &text) {
            eprintln!("warning: {}: {notice}", toml_path.display());
        }
        if description.format != MODEL_FORMAT {
            return Err(AcousticError::Model {
                path: toml_path,
                problem: format!(
                    "format {} is not supported (this program reads format {MODEL_FORMAT})",
                    description.format
                ),
            });
        }
        let invalid = |e: AcousticError| AcousticError::Model {
            path: toml_path.clone(),
            problem: e.to_string(),
        };
        description.units.validate().map_err(invalid)?;
        description.architecture.validate().map_err(invalid)?;
        description
            .features
            .validate()
            .map_err(|e| invalid(e.into()))?;
        if let Some(vectors) = &description.speaker_vectors {
            vectors.validate().map_err(invalid)?;
        }
        if let Some(inference) = &description.inference {
            inference
                .validate(&description.features)
                .map_err(|e| AcousticError::Model {
                    path: toml_path.clone(),
                    problem: format!("[inference] {e}"),
                })?;
        }
        description
            .architecture
            .check_size(description.network_input(), description.units.len())
            .map_err(invalid)?;
        // The extractor is checked before the weights, so that a mismatch is blamed on it.
        let extractor = match &description.speaker_vectors {
            Some(_) => Some(IvectorExtractor::load(dir)?),
            None => None,
        };
        let weights = dir.join("model.safetensors");
        let tensors = candle_core::safetensors::load(&weights, &Device::Cpu).map_err(|e| {
            AcousticError::Model {
                path: weights.clone(),
                problem: e.to_string(),
            }
        })?;
        let vb =
            candle_nn::VarBuilder::from_tensors(tensors, candle_core::DType::F32, &Device::Cpu);
        let mut network = Tdnn::new(
            vb,
            &description.architecture,
            description.network_input(),
            description.units.len(),
        )
        .map_err(|e| AcousticError::Model {
            path: weights,
            problem: e.to_string(),
        })?;
        network.set_inference_precision(inference_precision(&description));
        let model = AcousticModel {
            description,
            network,
            speaker_vectors: None,
        };
        match extractor {
            Some(extractor) => {
                model.with_speaker_vectors(extractor, &dir.join(EXTRACTOR_DESCRIPTION))
            }
            None => Ok(model),
        }
    }

    /// Attaches the i-vector extractor the description's `speaker_vectors` calls for. Fails,
    /// naming `source` (the extractor's file), when the model takes no speaker vectors, or when
    /// the extractor's features or vector dimension differ from the model's.
    pub fn with_speaker_vectors(
        mut self,
        extractor: IvectorExtractor,
        source: &Path,
    ) -> Result<AcousticModel, AcousticError> {
        let mismatch = |problem: String| AcousticError::Model {
            path: source.to_path_buf(),
            problem,
        };
        let Some(vectors) = &self.description.speaker_vectors else {
            return Err(mismatch(
                "the model takes no speaker vectors (model.toml has no [speaker_vectors])".into(),
            ));
        };
        if extractor.output_dimension() != vectors.dimension() {
            return Err(mismatch(format!(
                "the extractor gives {}-dimensional vectors, the model takes {} (model.toml, [speaker_vectors])",
                extractor.output_dimension(),
                vectors.dimension()
            )));
        }
        extractor
            .check_front_end(
                &source.display().to_string(),
                self.description.features.dims(),
                crate::speaker_vectors::FEATURE_FRAME_SHIFT_SECONDS,
            )
            .map_err(|e| mismatch(format!("{e} (model.toml, [features])")))?;
        self.speaker_vectors = Some(extractor);
        Ok(self)
    }

    /// The i-vector extractor of a model with speaker vectors.
    pub fn speaker_vectors(&self) -> Option<&IvectorExtractor> {
        self.speaker_vectors.as_ref()
    }

    /// A model from in-memory tensors (as [`AcousticModel::save`] takes them); a model with
    /// speaker vectors needs its extractor attached ([`AcousticModel::with_speaker_vectors`]).
    pub fn from_parameters(
        description: ModelDescription,
        tensors: &BTreeMap<String, Var>,
    ) -> Result<AcousticModel, AcousticError> {
        let mut network = Tdnn::new(
            var_builder(tensors),
            &description.architecture,
            description.network_input(),
            description.units.len(),
        )?;
        network.set_inference_precision(inference_precision(&description));
        Ok(AcousticModel {
            description,
            network,
            speaker_vectors: None,
        })
    }

    /// Unit names, blank at index 0.
    pub fn units(&self) -> &[String] {
        &self.description.units.units
    }

    /// The unit inventory.
    pub fn inventory(&self) -> &UnitInventory {
        &self.description.units
    }

    /// Front-end settings the model was trained with.
    pub fn feature_config(&self) -> &FeatureConfig {
        &self.description.features
    }

    /// The whole `model.toml`.
    pub fn description(&self) -> &ModelDescription {
        &self.description
    }

    /// Seconds between output frames (10 ms × subsampling).
    pub fn frame_shift_seconds(&self) -> f64 {
        0.01 * self.description.architecture.subsampling() as f64
    }

    /// The test-time warp search in effect: `[inference]` of `model.toml`, or what
    /// [`AcousticModel::set_inference`] put in its place. `None`: the unwarped front end alone.
    pub fn inference(&self) -> Option<&crate::warp_search::Inference> {
        self.description.inference.as_ref()
    }

    /// Replaces the `[inference]` table for this loaded model (for a program using the
    /// library; the commands read the table of `model.toml` and have no flag for it), checked
    /// against the model's front end; `None`, or the single factor 1.0 with f32 products, is
    /// no table.
    pub fn set_inference(
        &mut self,
        inference: Option<crate::warp_search::Inference>,
    ) -> Result<(), AcousticError> {
        if let Some(search) = &inference {
            search.validate(&self.description.features)?;
        }
        self.description.inference = inference.filter(|search| {
            search.candidates() != [crate::warp_search::Candidate::PLAIN]
                || search.matmul_precision != MatmulPrecision::F32
        });
        let precision = inference_precision(&self.description);
        self.network.set_inference_precision(precision);
        Ok(())
    }

    /// The number format the network's products run in for this model on this CPU
    /// (`[inference] matmul_precision`, f32 where the CPU lacks AVX-512 BF16).
    pub fn matmul_precision(&self) -> MatmulPrecision {
        inference_precision(&self.description)
    }

    /// Log-posteriors of one segment's 16 kHz samples through the most confident candidate of
    /// the warp search ([`AcousticModel::segment_readings`], first item), and the front end
    /// that gave them ([`Candidate::PLAIN`] without a search).
    pub fn segment_posteriors(
        &self,
        extractor: &isogloss_features::FeatureExtractor,
        samples: &[f32],
    ) -> Result<(Array2<f32>, Candidate), AcousticError> {
        let mut readings = self.segment_readings(extractor, samples)?;
        // Never empty: a search has at least one candidate, and so has no search.
        Ok(readings.swap_remove(0))
    }

    /// Log-posteriors of one segment's 16 kHz samples as `transcribe` computes them: the
    /// features of `extractor` (the model's front end), normalised by the segment's own
    /// statistics unless the model normalises nothing, through every candidate of the warp
    /// search ([`crate::warp_search`]). What the decoder is handed: every candidate's
    /// posteriors with its front end, most confident first, or the most confident alone
    /// (`choose = "posteriors"`, [`crate::warp_search::arrange`]); the unwarped front end alone
    /// without a search. A tempo candidate's frames lie `candidate.speed` times the model's
    /// frame shift apart in the segment. A segment shorter than one frame gives no frames.
    pub fn segment_readings(
        &self,
        extractor: &isogloss_features::FeatureExtractor,
        samples: &[f32],
    ) -> Result<Vec<(Array2<f32>, Candidate)>, AcousticError> {
        let config = &self.description.features;
        let (frontends, choose) = match &self.description.inference {
            Some(search) => (search.frontends(config.sample_rate)?, search.choose),
            None => (Frontend::plain(), Default::default()),
        };
        let mut candidates = Vec::with_capacity(frontends.len());
        for frontend in &frontends {
            let mut features = frontend.features(extractor, samples)?;
            if features.nrows() == 0 {
                if frontend.candidate == Candidate::PLAIN {
                    return Ok(vec![(
                        Array2::zeros((0, self.units().len())),
                        Candidate::PLAIN,
                    )]);
                }
                candidates.push((Array2::zeros((0, self.units().len())), frontend.candidate));
                continue;
            }
            // A segment of a recording is normalised by its own statistics. A model trained
            // with per-speaker statistics sees a slightly different normalisation here,
            // because the speakers of an arbitrary recording are unknown.
            if config.cmvn != isogloss_features::CmvnMode::None {
                let cmvn = isogloss_features::Cmvn::from_features(
                    &features,
                    config.unit_variance,
                    "segment",
                )?;
                cmvn.apply(&mut features, "segment")?;
            }
            candidates.push((self.log_posteriors(&features)?, frontend.candidate));
        }
        Ok(crate::warp_search::arrange(choose, candidates))
    }

    /// What the network reads for `[frames, dims]` normalised features: the features
    /// themselves, or with speaker vectors the features with the online vector of each frame
    /// appended ([`crate::speaker_vectors::with_vectors`], a fresh window from the first frame).
    pub fn network_input<'a>(
        &self,
        features: &'a Array2<f32>,
    ) -> Result<Cow<'a, Array2<f32>>, AcousticError> {
        match (&self.description.speaker_vectors, &self.speaker_vectors) {
            (None, _) => Ok(Cow::Borrowed(features)),
            (Some(_), Some(extractor)) => Ok(Cow::Owned(crate::speaker_vectors::with_vectors(
                extractor,
                "features",
                features.view(),
            )?)),
            (Some(_), None) => Err(AcousticError::Config(
                "the model takes speaker vectors but has no i-vector extractor attached".into(),
            )),
        }
    }

    /// Natural-log posteriors `[⌈frames / subsampling⌉, units]` for `[frames, dims]` features
    /// normalised as the front end's `cmvn` setting says. Empty input gives an empty output.
    /// A model with speaker vectors appends the online vector of each frame first
    /// ([`crate::speaker_vectors`]), starting a fresh window at the first frame.
    pub fn log_posteriors(&self, features: &Array2<f32>) -> Result<Array2<f32>, AcousticError> {
        let (frames, dims) = features.dim();
        let units = self.units().len();
        if frames == 0 {
            return Ok(Array2::zeros((0, units)));
        }
        if dims != self.description.features.dims() {
            return Err(AcousticError::Shape(format!(
                "features have {dims} dims, the model takes {}",
                self.description.features.dims()
            )));
        }
        let features = self.network_input(features)?;
        let dims = features.ncols();
        let (left, right) = self.description.architecture.context();
        let mut padded: Vec<f32> = Vec::with_capacity((frames + left + right) * dims);
        for t in 0..frames + left + right {
            let source = t.saturating_sub(left).min(frames - 1);
            padded.extend(features.row(source).iter());
        }
        let input = Tensor::from_vec(padded, (1, frames + left + right, dims), &Device::Cpu)?;
        let logits = self.network.forward(&input)?.squeeze(0)?;
        let log_probs = candle_nn::ops::log_softmax(&logits, 1)?;
        let out_frames = log_probs.dim(0)?;
        let values: Vec<f32> = log_probs.flatten_all()?.to_vec1()?;
        Array2::from_shape_vec((out_frames, units), values)
            .map_err(|e| AcousticError::Shape(e.to_string()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::ModelConfig;
    use crate::tdnn::initial_parameters;
    use crate::units::UnitInventory;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn a_saved_model_loads_and_gives_normalised_posteriors() {
        let config = ModelConfig::small();
        let (dir, description, parameters) = saved_small_model(|description| {
            description.training = Some(config.training.clone());
            description.augmentation = Some(config.augmentation.clone());
        });
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let model = AcousticModel::load(dir.path()).unwrap();
        assert_eq!(model.description(), &description);
        assert_eq!(model.units()[0], "<ctc-blank>");
        let in_memory = AcousticModel::from_parameters(description.clone(), &parameters).unwrap();
        let features = Array2::from_shape_fn((50, 39), |_| rng.random_range(-1.0f32..1.0));
        let posteriors = model.log_posteriors(&features).unwrap();
        assert_eq!(posteriors.dim(), (17, 7));
        assert_eq!(posteriors, in_memory.log_posteriors(&features).unwrap());
        for row in posteriors.rows() {
            let total: f32 = row.iter().map(|v| v.exp()).sum();
            assert!((total - 1.0).abs() < 1e-5);
        }
        assert_eq!(
            model.log_posteriors(&Array2::zeros((0, 39))).unwrap().dim(),
            (0, 7)
        );
        assert!(model.log_posteriors(&Array2::zeros((5, 13))).is_err());

        // The same model.toml in the previous release's spellings reads as the same model.
        let new_text = std::fs::read_to_string(dir.path().join("model.toml")).unwrap();
        let mut old_text = new_text.replace("\"<ctc-blank>\"", "\"<blk>\"");
        for (old, new) in isogloss_features::DEPRECATED_KEYS
            .into_iter()
            .chain(crate::config::DEPRECATED_LAYER_KEYS)
        {
            old_text = old_text.replace(&format!("\n{new} ="), &format!("\n{old} ="));
        }
        assert!(old_text.contains("\nframe_length =") && old_text.contains("\noffsets ="));
        let mut old = toml::from_str(&old_text).unwrap();
        let notices = upgrade_previous_release(&mut old, &old_text);
        assert_eq!(old, description);
        // 8 feature keys, 3 layer keys, the blank, and how to update the file.
        assert_eq!(notices.len(), 13, "{notices:?}");
        assert!(notices.iter().any(|n| n.contains("`<blk>`")));
        assert!(upgrade_previous_release(&mut old, &new_text).is_empty());
        std::fs::write(dir.path().join("model.toml"), &old_text).unwrap();
        let reread = AcousticModel::load(dir.path()).unwrap();
        assert_eq!(reread.description(), &description);
        assert_eq!(reread.log_posteriors(&features).unwrap(), posteriors);

        std::fs::write(dir.path().join("model.toml"), "format = 99").unwrap();
        let error = AcousticModel::load(dir.path()).err().unwrap();
        assert!(error.to_string().contains("model.toml"), "{error}");
    }
    /// Issue 16: a `model.toml` was used without checking its network description; taps such
    /// as `[-2000000000, 0]` overflowed the context arithmetic. Every out-of-range size is now
    /// an error naming `model.toml`, before any weight is read.
    /// A small layer-norm model with fresh weights saved in a temporary directory, after
    /// `change` has filled in its description's optional parts.
    fn saved_small_model(
        change: impl FnOnce(&mut ModelDescription),
    ) -> (
        tempfile::TempDir,
        ModelDescription,
        BTreeMap<String, candle_core::Var>,
    ) {
        // Layer normalisation: fresh parameters carry no running statistics (the batch-norm
        // round trip is tested in train.rs with a trained model).
        let mut config = ModelConfig::small();
        config.model.normalization = crate::config::Normalization::Layer;
        let units = UnitInventory::graphemes(["abc de"]);
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let parameters =
            initial_parameters(&config.model, config.features.dims(), units.len(), &mut rng)
                .unwrap();
        let mut description = ModelDescription {
            format: MODEL_FORMAT,
            units,
            features: config.features.clone(),
            architecture: config.model.clone(),
            provenance: Provenance::default(),
            training: None,
            augmentation: None,
            self_training: Vec::new(),
            speaker_vectors: None,
            inference: None,
        };
        change(&mut description);
        let dir = tempfile::tempdir().unwrap();
        AcousticModel::save(dir.path(), &description, &parameters).unwrap();
        (dir, description, parameters)
    }

    #[test]
    fn out_of_range_descriptions_are_errors_naming_model_toml() {
        let (dir, _, _) = saved_small_model(|_| {});
        let good = std::fs::read_to_string(dir.path().join("model.toml")).unwrap();
        assert!(good.contains("taps = [\n    -2,"), "{good}");
        for (bad, expected) in [
            (
                good.replacen("taps = [\n    -2,", "taps = [\n    -2000000000,", 1),
                "taps must lie within -64 to 64",
            ),
            (
                good.replacen("width = 320", "width = 99999999", 1),
                "width must be from 1 to 16384",
            ),
            (
                good.replacen("fft_size = 512", "fft_size = 4000000000000", 1),
                "fft_size",
            ),
        ] {
            std::fs::write(dir.path().join("model.toml"), &bad).unwrap();
            let message = AcousticModel::load(dir.path()).err().unwrap().to_string();
            assert!(
                message.contains("model.toml") && message.contains(expected),
                "{message}"
            );
        }
    }

    /// The shipped demo model gives the same logits through the fused layers as through the
    /// layers written with candle primitives.
    #[test]
    fn the_demo_model_gives_the_same_outputs_through_the_fused_layers() {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../models/demo");
        let model = AcousticModel::load(&dir).unwrap();
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let (left, right) = model.description().architecture.context();
        let dims = model.feature_config().dims();
        let frames = 137 + left + right;
        let x: Vec<f32> = (0..2 * frames * dims)
            .map(|_| rng.random_range(-2.0f32..2.0))
            .collect();
        let input = Tensor::from_vec(x, (2, frames, dims), &Device::Cpu).unwrap();
        // Both in f32 (the shipped model.toml asks for bf16 products at inference).
        let mut network = model.network.clone();
        network.set_inference_precision(MatmulPrecision::F32);
        let fused = network.forward(&input).unwrap();
        let reference = network.forward_reference(&input, None).unwrap();
        let diff: f32 = (fused - reference)
            .unwrap()
            .abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap()
            .to_scalar()
            .unwrap();
        assert!(diff < 1e-4, "logits differ by {diff}");
    }

    /// The README says the shipped demo model is `configs/tdnn-deep-robust.toml` trained for
    /// its 160 epochs with seed 2: its `model.toml` records that network, front end, schedule,
    /// precision of the training products and perturbation, the last of the 160 epochs, and the
    /// `[inference]` table `isogloss train` writes for that recipe (the warp search over its VTLP
    /// range, bf16 products).
    #[test]
    fn the_demo_model_was_trained_with_the_deep_robust_recipe() {
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
        let model = AcousticModel::load(&root.join("models/demo")).unwrap();
        let config = ModelConfig::read(&root.join("configs/tdnn-deep-robust.toml")).unwrap();
        let description = model.description();
        assert_eq!(description.architecture, config.model);
        assert_eq!(description.architecture.layers.len(), 8);
        assert_eq!(description.features, config.features);
        assert_eq!(description.training.as_ref(), Some(&config.training));
        assert_eq!(
            description.augmentation.as_ref(),
            Some(&config.augmentation)
        );
        assert_eq!(description.provenance.seed, 2);
        assert_eq!(description.provenance.epochs, 160);
        assert_eq!(
            description.inference,
            crate::warp_search::Inference::from_training(
                &config.augmentation.vtlp,
                config.training.matmul_precision
            )
        );
        assert_eq!(
            description.inference.as_ref().unwrap().warp_factors,
            [1.0, 0.9, 1.1]
        );
    }

    /// One real recording of the demo's unseen voices through the shipped model: the searched
    /// posteriors are those of the front end whose frames are most confident, each front end's
    /// features computed here the long way (warped filter bank or resampled audio, per-segment
    /// CMVN); without a search, or with the single factor 1.0, the plain front end's.
    #[test]
    fn the_warp_search_keeps_the_most_confident_factor() {
        use crate::warp_search::Inference;
        use isogloss_features::{Cmvn, FeatureExtractor, VtlpWarp};
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
        let mut model = AcousticModel::load(&root.join("models/demo")).unwrap();
        // f32 products throughout, so that turning the search off below changes nothing else.
        let f32_search = Inference {
            matmul_precision: MatmulPrecision::F32,
            ..model.inference().unwrap().clone()
        };
        model.set_inference(Some(f32_search)).unwrap();
        let samples = isogloss_audio::read_segments(
            &root.join("tests/data/demo/cross/clean/fells-cross01-0001.ogg"),
            &[isogloss_audio::Segment {
                start: 0.0,
                end: None,
            }],
        )
        .unwrap()
        .remove(0);
        let config = model.feature_config().clone();
        let extractor = FeatureExtractor::new(&config).unwrap();
        let by_hand = |speed: f64, warp: f64| {
            let samples = if speed == 1.0 {
                samples.clone()
            } else {
                isogloss_audio::speed_perturb(&samples, speed)
            };
            let mut features = if warp == 1.0 {
                extractor.extract(&samples)
            } else {
                let warp = VtlpWarp::new(warp, 4800.0, 16000).unwrap();
                extractor.extract_warped(&samples, &warp).unwrap()
            };
            let cmvn = Cmvn::from_features(&features, true, "x").unwrap();
            cmvn.apply(&mut features, "x").unwrap();
            model.log_posteriors(&features).unwrap()
        };
        let most_confident = |candidates: &[(Candidate, Array2<f32>)]| {
            let confidences: Vec<f64> = candidates
                .iter()
                .map(|(_, p)| crate::warp_search::confidence(p))
                .collect();
            // The front ends do give different posteriors, so the choice is a real one.
            assert!(confidences[1..].iter().all(|&c| c != confidences[0]));
            (0..candidates.len())
                .max_by(|&a, &b| confidences[a].total_cmp(&confidences[b]))
                .unwrap()
        };
        let c = |speed, warp| Candidate { speed, warp };
        let mut candidates: Vec<(Candidate, Array2<f32>)> = [c(1.0, 1.0), c(1.0, 0.9), c(1.0, 1.1)]
            .into_iter()
            .map(|k| (k, by_hand(k.speed, k.warp)))
            .collect();
        let best = most_confident(&candidates);
        let (searched, chosen) = model.segment_posteriors(&extractor, &samples).unwrap();
        assert_eq!(chosen, candidates[best].0);
        assert_eq!(searched, candidates[best].1);

        // With tempo candidates as well (their frames at another rate).
        for speed in [0.9, 1.1] {
            candidates.push((c(speed, 1.0), by_hand(speed, 1.0)));
        }
        let best = most_confident(&candidates);
        let search = Inference {
            speed_factors: vec![0.9, 1.1],
            ..model.inference().unwrap().clone()
        };
        model.set_inference(Some(search)).unwrap();
        let (searched, chosen) = model.segment_posteriors(&extractor, &samples).unwrap();
        assert_eq!(chosen, candidates[best].0);
        assert_eq!(searched, candidates[best].1);
        let slow = &candidates[3].1;
        assert!(slow.nrows() > candidates[0].1.nrows(), "{}", slow.nrows());

        model.set_inference(None).unwrap();
        let (plain, chosen) = model.segment_posteriors(&extractor, &samples).unwrap();
        assert_eq!((chosen, &plain), (Candidate::PLAIN, &candidates[0].1));
        model
            .set_inference(Some(Inference {
                warp_factors: vec![1.0],
                warp_boundary_hz: 4800.0,
                speed_factors: Vec::new(),
                choose: Default::default(),
                matmul_precision: Default::default(),
            }))
            .unwrap();
        assert!(model.inference().is_none());
        assert_eq!(
            model.segment_posteriors(&extractor, &samples).unwrap().0,
            plain
        );
        let too_strong = Inference {
            warp_factors: vec![1.0, 0.3],
            warp_boundary_hz: 4800.0,
            speed_factors: Vec::new(),
            choose: Default::default(),
            matmul_precision: Default::default(),
        };
        assert!(model.set_inference(Some(too_strong)).is_err());
    }

    #[test]
    fn an_inference_table_may_ask_for_bf16_products_alone() {
        let (dir, _, _) = saved_small_model(|_| {});
        let f32_model = AcousticModel::load(dir.path()).unwrap();
        assert_eq!(f32_model.matmul_precision(), MatmulPrecision::F32);
        let path = dir.path().join("model.toml");
        let text = std::fs::read_to_string(&path).unwrap();
        std::fs::write(
            &path,
            format!("{text}\n[inference]\nmatmul_precision = \"bf16\"\n"),
        )
        .unwrap();
        let model = AcousticModel::load(dir.path()).unwrap();
        let search = model.inference().expect("the table is kept").clone();
        // No warp factors named: the unwarped front end alone.
        assert_eq!(search.candidates(), [Candidate::PLAIN]);
        assert_eq!(search.matmul_precision, MatmulPrecision::Bf16);
        let mut rng = ChaCha8Rng::seed_from_u64(6);
        let features = Array2::from_shape_fn((120, 39), |_| rng.random_range(-1.0f32..1.0));
        let exact = f32_model.log_posteriors(&features).unwrap();
        let rounded = model.log_posteriors(&features).unwrap();
        if !crate::fused::bf16_available() {
            // This CPU runs f32 whatever the table asks.
            assert_eq!(model.matmul_precision(), MatmulPrecision::F32);
            assert_eq!(rounded, exact);
            return;
        }
        assert_eq!(model.matmul_precision(), MatmulPrecision::Bf16);
        // Operands rounded to 8 significant bits: close to the f32 posteriors, not equal.
        let largest = exact
            .iter()
            .zip(&rounded)
            .map(|(a, b)| (a - b).abs())
            .fold(0f32, f32::max);
        assert!(largest > 0.0 && largest < 0.05, "{largest}");
        // Written back, the table keeps the key; set to f32 with no search, it is no table.
        let mut model = model;
        let mut plain = search;
        plain.matmul_precision = MatmulPrecision::F32;
        model.set_inference(Some(plain)).unwrap();
        assert!(model.inference().is_none());
        assert_eq!(model.log_posteriors(&features).unwrap(), exact);
    }

    #[test]
    fn a_bad_inference_table_is_an_error_naming_model_toml_and_the_key() {
        let search = crate::warp_search::Inference::from_training(
            &ModelConfig::small().augmentation.vtlp,
            MatmulPrecision::F32,
        );
        assert!(search.is_some());
        let (dir, description, _) = saved_small_model(|d| d.inference = search);
        let good = std::fs::read_to_string(dir.path().join("model.toml")).unwrap();
        assert!(good.contains("[inference]\nwarp_factors = ["), "{good}");
        assert_eq!(
            AcousticModel::load(dir.path()).unwrap().description(),
            &description
        );
        let table = good.find("[inference]").unwrap();
        for (bad, expected) in [
            ("[inference]\nwarp_factors = []\n", "no factor given"),
            (
                "[inference]\nwarp_factors = [1.0, -1.1]\n",
                "-1.1 is not a positive number",
            ),
            (
                "[inference]\nwarp_factors = [1.0, 0.3]\n",
                "0.3 is outside 0.5 to 2",
            ),
            (
                "[inference]\nwarp_factor = [1.0]\n",
                "unknown field `warp_factor`",
            ),
            (
                "[inference]\nmatmul_precision = \"fp8\"\n",
                "unknown variant `fp8`",
            ),
        ] {
            let text = format!("{}{bad}", &good[..table]);
            std::fs::write(dir.path().join("model.toml"), text).unwrap();
            let message = AcousticModel::load(dir.path()).err().unwrap().to_string();
            assert!(
                message.contains("model.toml") && message.contains(expected),
                "{message}"
            );
        }
    }
}

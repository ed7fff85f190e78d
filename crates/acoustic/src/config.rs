//! Architecture and training settings, read from TOML (`configs/tdnn-*.toml`).

use isogloss_audio::augment::{
    AugmentConfig, BandLimitConfig, CodecConfig, GainConfig, NoiseConfig, ReverbConfig,
    RevoiceConfig,
};
use isogloss_features::{deprecated_spellings, CmvnMode, FeatureConfig, SpecAugment, VtlpConfig};
use isogloss_speaker::{ExtractionMode, ExtractorConfig};
use serde::{Deserialize, Serialize};

use crate::AcousticError;

/// How hidden activations are normalised (`normalization = "batch" | "layer" | "none"`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Normalization {
    /// Affine, batch normalisation, ReLU: each unit normalised over the batch's valid frames in
    /// training and with running estimates of its mean and variance in inference. The layer has
    /// no bias (the batch mean would cancel it).
    Batch,
    /// Affine, ReLU, layer normalisation: per frame over the hidden units (independent of batch
    /// composition and padding).
    Layer,
    /// Affine, ReLU.
    None,
}

/// One hidden TDNN layer: the input frames at the `taps` side by side, affine, ReLU and
/// normalisation (in the order [`Normalization`] says), dropout. Written
/// `{ taps = [-1, 0, 1], width = 320, keep_every = 3 }`; the spellings of the previous release
/// (`offsets`, `dims`, `subsample`) are still read, with a deprecation warning
/// ([`deprecated_layer_spellings`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerConfig {
    /// Frame offsets read together, in frames *of this layer's input*; sorted, distinct.
    #[serde(alias = "offsets")]
    pub taps: Vec<i32>,
    /// Output width.
    #[serde(alias = "dims")]
    pub width: usize,
    /// Keep every `keep_every`-th output frame (1 = all frames, no subsampling).
    #[serde(default = "one", alias = "subsample")]
    pub keep_every: usize,
}

/// TDNN layer keys of the previous release and the keys that replace them.
pub const DEPRECATED_LAYER_KEYS: [(&str, &str); 3] = [
    ("offsets", "taps"),
    ("dims", "width"),
    ("subsample", "keep_every"),
];

/// One deprecation notice per old key in a list of layer tables (`[model].layers` of a training
/// config, `[[architecture.layers]]` of a `model.toml`); callers print them, naming the file.
pub fn deprecated_layer_spellings(layers: Option<&toml::Value>) -> Vec<String> {
    let tables: Vec<&toml::Table> = layers
        .and_then(toml::Value::as_array)
        .map(|layers| layers.iter().filter_map(toml::Value::as_table).collect())
        .unwrap_or_default();
    DEPRECATED_LAYER_KEYS
        .iter()
        .filter(|(old, _)| tables.iter().any(|table| table.contains_key(*old)))
        .map(|(old, new)| format!("the TDNN layer key `{old}` is deprecated; write `{new}`"))
        .collect()
}

fn one() -> usize {
    1
}

/// Most hidden layers a network may have.
pub const MAX_LAYERS: usize = 64;
/// Largest distance of a tap from the current frame (frames of the layer's input).
pub const MAX_TAP: i32 = 64;
/// Widest hidden layer.
pub const MAX_WIDTH: usize = 16_384;
/// Largest total subsampling (product of `keep_every` over the layers).
pub const MAX_SUBSAMPLING: usize = 64;
/// Most trainable parameters (800 MB of weights; training keeps three copies with the AdamW
/// moments).
pub const MAX_PARAMETERS: u64 = 200_000_000;
/// Largest `epochs` and `patience`.
pub const MAX_EPOCHS: usize = 100_000;
/// Largest `batch_frames` (about 2.8 hours of 10 ms frames in one batch).
pub const MAX_BATCH_FRAMES: usize = 1_000_000;
/// Most speed-perturbation factors.
pub const MAX_SPEED_FACTORS: usize = 16;

/// The network: hidden layers then a final affine layer over the units (blank included).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TdnnConfig {
    /// Hidden layers in order.
    pub layers: Vec<LayerConfig>,
    /// Normalisation of the hidden layers (batch norm before the ReLU, layer norm after it).
    pub normalization: Normalization,
    /// Dropout probability on hidden activations during training.
    #[serde(default)]
    pub dropout: f32,
}

impl TdnnConfig {
    /// Checks the invariants the model relies on, naming the layer at fault.
    pub fn validate(&self) -> Result<(), AcousticError> {
        if self.layers.is_empty() {
            return Err(AcousticError::Config(
                "the network needs at least one hidden layer, found none".into(),
            ));
        }
        if self.layers.len() > MAX_LAYERS {
            return Err(AcousticError::Config(format!(
                "the network may have at most {MAX_LAYERS} hidden layers, found {}",
                self.layers.len()
            )));
        }
        let mut subsampling = 1usize;
        for (i, layer) in self.layers.iter().enumerate() {
            let sorted = layer.taps.windows(2).all(|w| w[0] < w[1]);
            if layer.taps.is_empty() || !sorted {
                return Err(AcousticError::Config(format!(
                    "layer {i}: taps must be a non-empty increasing list, found {:?}",
                    layer.taps
                )));
            }
            if let Some(tap) = layer.taps.iter().find(|t| t.abs() > MAX_TAP) {
                return Err(AcousticError::Config(format!(
                    "layer {i}: taps must lie within -{MAX_TAP} to {MAX_TAP} frames, found {tap}"
                )));
            }
            if !(1..=MAX_WIDTH).contains(&layer.width) {
                return Err(AcousticError::Config(format!(
                    "layer {i}: width must be from 1 to {MAX_WIDTH}, found {}",
                    layer.width
                )));
            }
            subsampling = subsampling.saturating_mul(layer.keep_every);
            if layer.keep_every == 0 || subsampling > MAX_SUBSAMPLING {
                return Err(AcousticError::Config(format!(
                    "layer {i}: keep_every must be at least 1 and the product over the layers at most {MAX_SUBSAMPLING}, found keep_every {}",
                    layer.keep_every
                )));
            }
        }
        if !(0.0..1.0).contains(&self.dropout) {
            return Err(AcousticError::Config(format!(
                "dropout must be in [0, 1), found {}",
                self.dropout
            )));
        }
        Ok(())
    }

    /// Checks that the network for `input_dims` features and `units` outputs has at most
    /// [`MAX_PARAMETERS`] parameters (call after [`TdnnConfig::validate`]).
    pub fn check_size(
        &self,
        input: impl Into<NetworkInput>,
        units: usize,
    ) -> Result<(), AcousticError> {
        let input = input.into();
        let input_dims = input.frame_dims;
        let count = self.parameter_count(input, units) as u64;
        if count > MAX_PARAMETERS {
            return Err(AcousticError::Config(format!(
                "the network would have {count} parameters for {input_dims} input dimensions and {units} units; at most {MAX_PARAMETERS} are supported"
            )));
        }
        Ok(())
    }

    /// Total subsampling factor (product over layers): one output frame per this many input frames.
    pub fn subsampling(&self) -> usize {
        self.layers
            .iter()
            .fold(1usize, |product, l| product.saturating_mul(l.keep_every))
    }

    /// Input frames needed to the left and right of a frame, at the input frame rate.
    pub fn context(&self) -> (usize, usize) {
        let (mut left, mut right, mut rate) = (0usize, 0usize, 1usize);
        for layer in &self.layers {
            let first = *layer.taps.first().unwrap_or(&0);
            let last = *layer.taps.last().unwrap_or(&0);
            left = left.saturating_add((-(first as i64)).max(0) as usize * rate);
            right = right.saturating_add((last as i64).max(0) as usize * rate);
            rate = rate.saturating_mul(layer.keep_every);
        }
        (left, right)
    }

    /// Number of trainable parameters for `input` (features per frame, vectors per layer) and
    /// `units` outputs (the running statistics of batch normalisation are not trained and not
    /// counted).
    pub fn parameter_count(&self, input: impl Into<NetworkInput>, units: usize) -> usize {
        // Saturating: a description read from a file may ask for more than a usize holds.
        let input = input.into();
        let mut count = 0usize;
        let mut dims = input.frame_dims;
        for (i, layer) in self.layers.iter().enumerate() {
            if i > 0 {
                dims = dims.saturating_add(input.layer_vector_dims);
            }
            let weights = layer
                .taps
                .len()
                .saturating_mul(dims)
                .saturating_mul(layer.width);
            let per_unit = match self.normalization {
                Normalization::Batch => 2,
                Normalization::Layer => 3,
                Normalization::None => 1,
            };
            count = count
                .saturating_add(weights)
                .saturating_add(layer.width.saturating_mul(per_unit));
            dims = layer.width;
        }
        count
            .saturating_add(dims.saturating_mul(units))
            .saturating_add(units)
    }
}

/// How the learning rate moves after the warm-up.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Schedule {
    /// Half a cosine from the peak down to `final_rate × peak` at the last planned update.
    Cosine,
    /// `peak · sqrt(warm-up / update)`: never reaches a floor, for open-ended training.
    InverseSqrt,
    /// The peak throughout.
    Constant,
}

/// Serde's test for a setting left at 0 (not written out).
fn is_zero(value: &f64) -> bool {
    *value == 0.0
}

/// Which epoch's weights the model directory holds (`[training] keep`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Keep {
    /// The latest epoch's: at the end of a run with the cosine schedule, the weights annealed to
    /// `final_rate`.
    #[default]
    Last,
    /// The epoch with the lowest dev loss so far.
    BestDevLoss,
}

/// Number format of the matrix products of training (`[training] matmul_precision`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum MatmulPrecision {
    /// f32 operands and sums.
    #[default]
    F32,
    /// Operands rounded to bfloat16, sums in f32, on CPUs with AVX-512 BF16 (others use f32).
    /// Weights, optimizer, normalisation, CTC and inference stay f32.
    Bf16,
}

impl MatmulPrecision {
    /// The precision this CPU runs when `self` is asked for: bf16 needs AVX-512 BF16.
    pub fn supported(self) -> MatmulPrecision {
        match self {
            MatmulPrecision::Bf16 if !crate::fused::bf16_available() => MatmulPrecision::F32,
            other => other,
        }
    }

    /// The configuration spelling.
    pub fn name(self) -> &'static str {
        match self {
            MatmulPrecision::F32 => "f32",
            MatmulPrecision::Bf16 => "bf16",
        }
    }
}

/// Optimisation settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct TrainingConfig {
    /// Passes over the training data (the `--epochs` flag overrides it; with `--minutes` the
    /// budget decides).
    pub epochs: usize,
    /// Upper bound on input frames (padding included) per batch.
    pub batch_frames: usize,
    /// Peak AdamW learning rate.
    pub learning_rate: f64,
    /// Shape of the rate after the warm-up.
    pub schedule: Schedule,
    /// Share of all planned updates spent warming up linearly from zero.
    pub warmup_share: f64,
    /// With the cosine schedule: the rate at the last planned update, as a share of the peak.
    pub final_rate: f64,
    /// AdamW decoupled weight decay.
    pub weight_decay: f64,
    /// Global gradient norm clip.
    pub clip_norm: f64,
    /// Stop after this many epochs without a better dev loss (0: never stop early).
    pub patience: usize,
    /// Which epoch the model directory holds: the last (default) or the best dev loss.
    pub keep: Keep,
    /// Number format of the training pass's matrix products: `"f32"` (default) or `"bf16"`.
    pub matmul_precision: MatmulPrecision,
    /// Weight averaging at the end of the run: the model directory holds the mean of the
    /// weights (parameters and batch-norm running statistics) at the end of every epoch that
    /// ends after `1 − average_share` of the planned updates, each epoch counted once. 0 (the
    /// default): one epoch's weights, as `keep` says.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub average_share: f64,
    /// Deprecated spelling of `augmentation.speed_factors` (read for one release).
    #[serde(default, skip_serializing)]
    pub speed_factors: Option<Vec<f32>>,
    /// Deprecated: the gain range is `augmentation.gain` now (read and ignored for one release).
    #[serde(default, skip_serializing)]
    pub volume_range: Option<f32>,
    /// Deprecated: `false` is `augmentation.masks` with no masks now (read for one release).
    #[serde(default, skip_serializing)]
    pub spec_augment: Option<bool>,
    /// Deprecated: the warm-up is `warmup_share` of all planned updates now (read and ignored
    /// for one release).
    #[serde(default, skip_serializing)]
    pub warmup_steps: Option<usize>,
}

impl Default for TrainingConfig {
    fn default() -> Self {
        TrainingConfig {
            epochs: 20,
            batch_frames: 5_000,
            learning_rate: 3e-3,
            schedule: Schedule::Cosine,
            warmup_share: 0.05,
            final_rate: 0.02,
            weight_decay: 1e-2,
            clip_norm: 5.0,
            patience: 0,
            keep: Keep::Last,
            matmul_precision: MatmulPrecision::F32,
            average_share: 0.0,
            speed_factors: None,
            volume_range: None,
            spec_augment: None,
            warmup_steps: None,
        }
    }
}

impl TrainingConfig {
    /// Checks every setting against its range; the message names the key.
    pub fn validate(&self) -> Result<(), AcousticError> {
        let invalid = |key: &str, expected: &str, found: String| {
            Err(AcousticError::Config(format!(
                "[training] {key} must be {expected}, found {found}"
            )))
        };
        if self.epochs > MAX_EPOCHS {
            return invalid("epochs", "at most 100000", self.epochs.to_string());
        }
        if self.patience > MAX_EPOCHS {
            return invalid("patience", "at most 100000", self.patience.to_string());
        }
        if !(1..=MAX_BATCH_FRAMES).contains(&self.batch_frames) {
            return invalid(
                "batch_frames",
                "from 1 to 1000000",
                self.batch_frames.to_string(),
            );
        }
        if !(self.learning_rate > 0.0 && self.learning_rate <= 1.0) {
            return invalid(
                "learning_rate",
                "above 0 and at most 1",
                self.learning_rate.to_string(),
            );
        }
        if !(self.weight_decay >= 0.0 && self.weight_decay <= 1.0) {
            return invalid("weight_decay", "from 0 to 1", self.weight_decay.to_string());
        }
        if !(self.clip_norm > 0.0 && self.clip_norm.is_finite()) {
            return invalid(
                "clip_norm",
                "a positive finite number",
                self.clip_norm.to_string(),
            );
        }
        if !(0.0..1.0).contains(&self.warmup_share) {
            return invalid(
                "warmup_share",
                "a share from 0 up to (not including) 1",
                self.warmup_share.to_string(),
            );
        }
        if !(0.0..=1.0).contains(&self.final_rate) {
            return invalid(
                "final_rate",
                "a share from 0 to 1",
                self.final_rate.to_string(),
            );
        }
        if !(0.0..1.0).contains(&self.average_share) {
            return invalid(
                "average_share",
                "a share from 0 up to (not including) 1",
                self.average_share.to_string(),
            );
        }
        if self.average_share > 0.0 && self.keep != Keep::Last {
            return invalid(
                "average_share",
                "0 with keep = \"best-dev-loss\" (the average is of the last epochs)",
                self.average_share.to_string(),
            );
        }
        Ok(())
    }
}

/// `[augmentation]`: how every training utterance is perturbed, afresh in every epoch. Speed
/// first (resampling), then the waveform steps (voice source, room, noise, band, gain, codec), then the features
/// (vocal-tract warp of the mel filters), normalisation and the time/frequency masks.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Augmentation {
    /// Speed perturbation factors, one drawn uniformly per utterance and epoch (1.0 = unchanged);
    /// empty disables it.
    pub speed_factors: Vec<f32>,
    /// Vocal-tract length perturbation.
    pub vtlp: VtlpConfig,
    /// Simulated room reverberation.
    pub reverb: ReverbConfig,
    /// Additive coloured noise and babble.
    pub noise: NoiseConfig,
    /// Band-limiting (random band or telephone).
    pub band_limit: BandLimitConfig,
    /// Gain.
    pub gain: GainConfig,
    /// A simulated low-bit-rate re-encode. Without an `[augmentation.codec]` table it is off, so
    /// configurations and `model.toml` files written before it existed keep their meaning.
    #[serde(default = "CodecConfig::off")]
    pub codec: CodecConfig,
    /// A new voice source through a linear-prediction vocoder. Off without an
    /// `[augmentation.revoice]` table, like the codec.
    #[serde(default = "RevoiceConfig::off")]
    pub revoice: RevoiceConfig,
    /// SpecAugment time and frequency masks on the normalised features (zero masks disable).
    pub masks: SpecAugment,
}

impl Default for Augmentation {
    /// A light dose of every perturbation: the library defaults of each (`AugmentConfig`,
    /// `VtlpConfig`, `SpecAugment`) at lower probabilities and a milder SNR range. In the
    /// equal-budget comparisons of DEVELOPERS.md ("Training recipe") the full dose slowed learning
    /// so much that it lost at budgets of 10 and 30 minutes, and none at all overfitted the
    /// training voices; this dose won on unseen speakers, unseen voices and every channel.
    fn default() -> Self {
        let waveform = AugmentConfig::default();
        let mut augmentation = Augmentation {
            speed_factors: vec![0.9, 1.0, 1.1],
            vtlp: VtlpConfig::default(),
            reverb: waveform.reverb,
            noise: waveform.noise,
            band_limit: waveform.band_limit,
            gain: waveform.gain,
            codec: CodecConfig::off(),
            revoice: RevoiceConfig::off(),
            masks: SpecAugment::default(),
        };
        augmentation.vtlp.probability = 0.5;
        augmentation.reverb.probability = 0.1;
        augmentation.noise.probability = 0.15;
        augmentation.noise.snr_db = [8.0, 25.0];
        augmentation.band_limit.probability = 0.1;
        augmentation.gain.probability = 0.3;
        augmentation.masks.time_masks = 1;
        augmentation.masks.frequency_masks = 1;
        augmentation
    }
}

impl Augmentation {
    /// No perturbation at all.
    pub fn none() -> Self {
        let mut none = Augmentation {
            speed_factors: Vec::new(),
            masks: SpecAugment {
                time_masks: 0,
                frequency_masks: 0,
                ..SpecAugment::default()
            },
            ..Augmentation::default()
        };
        none.vtlp.probability = 0.0;
        none.reverb.probability = 0.0;
        none.noise.probability = 0.0;
        none.band_limit.probability = 0.0;
        none.gain.probability = 0.0;
        none.codec.probability = 0.0;
        none.revoice.probability = 0.0;
        none
    }

    /// The waveform steps, as the audio crate's augmenter takes them.
    pub fn waveform(&self) -> AugmentConfig {
        AugmentConfig {
            noise: self.noise.clone(),
            reverb: self.reverb.clone(),
            band_limit: self.band_limit.clone(),
            gain: self.gain.clone(),
            codec: self.codec.clone(),
            revoice: self.revoice.clone(),
        }
    }

    /// True when any waveform step can be drawn.
    pub fn has_waveform_steps(&self) -> bool {
        [
            self.reverb.probability,
            self.noise.probability,
            self.band_limit.probability,
            self.gain.probability,
            self.codec.probability,
            self.revoice.probability,
        ]
        .iter()
        .any(|&p| p > 0.0)
    }

    /// Checks every setting, naming the key at fault (`augmentation.…`).
    pub fn validate(&self, features: &FeatureConfig) -> Result<(), AcousticError> {
        if self.speed_factors.len() > MAX_SPEED_FACTORS {
            return Err(AcousticError::Config(format!(
                "augmentation.speed_factors: expected at most {MAX_SPEED_FACTORS} factors, found {}",
                self.speed_factors.len()
            )));
        }
        if let Some(f) = self
            .speed_factors
            .iter()
            .find(|f| isogloss_audio::check_speed_factor(f64::from(**f)).is_err())
        {
            return Err(AcousticError::Config(format!(
                "augmentation.speed_factors: expected factors from 0.5 to 2.0, found {f}"
            )));
        }
        self.waveform()
            .validate()
            .map_err(|e| AcousticError::Config(e.to_string()))?;
        if self.vtlp.probability > 0.0 {
            self.vtlp.validate(features)?;
        }
        if !(0.0..=1.0).contains(&self.masks.max_time_fraction) {
            return Err(AcousticError::Config(format!(
                "augmentation.masks.max_time_fraction: expected a share in [0, 1], found {}",
                self.masks.max_time_fraction
            )));
        }
        Ok(())
    }
}

/// A configuration file: `[model]`, `[training]` and `[features]` tables.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelConfig {
    /// The network.
    pub model: TdnnConfig,
    /// How to train it.
    #[serde(default)]
    pub training: TrainingConfig,
    /// The front end; by default the MFCC front end of `docs/features.md` with per-speaker CMVN.
    #[serde(default = "default_features")]
    pub features: FeatureConfig,
    /// How training utterances are perturbed.
    #[serde(default)]
    pub augmentation: Augmentation,
    /// Speaker vectors (online i-vectors) as a second input of the network; absent: none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub speaker_vectors: Option<SpeakerVectors>,
}

/// How the speaker vector enters the network (`input = "frames"` or `"layers"`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum VectorInput {
    /// Appended to every feature frame, so that the first layer reads it beside the features at
    /// each of its taps.
    #[default]
    Frames,
    /// As `frames`, and appended again to the input of every later hidden layer (at that
    /// layer's frame rate), so that each layer has a learned map of the vector of its own: the
    /// vector changes only every `period` frames, so across a layer's taps it acts as a per-layer
    /// bias `B·v` (the taps' blocks sum to `B`).
    Layers,
}

/// The `[speaker_vectors]` table: an i-vector extractor trained before the network, whose online
/// vector of every frame is a second input of the network (see `crate::speaker_vectors`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SpeakerVectors {
    /// Where the vector enters the network.
    #[serde(default)]
    pub input: VectorInput,
    /// The extractor's settings (`[speaker_vectors.extractor]`, with its `[ubm]` table); missing
    /// keys take the extractor's defaults.
    #[serde(default)]
    pub extractor: ExtractorConfig,
}

impl SpeakerVectors {
    /// Checks the extractor settings; the mode must be `"online"`, the one rule that training
    /// and `isogloss transcribe` can both follow (transcription has no speaker labels).
    pub fn validate(&self) -> Result<(), AcousticError> {
        self.extractor
            .validate()
            .map_err(|e| AcousticError::Config(format!("speaker_vectors.extractor: {e}")))?;
        if self.extractor.mode != ExtractionMode::Online {
            return Err(AcousticError::Config(format!(
                "speaker_vectors.extractor.mode: expected \"online\" (transcription computes the vector from the audio it is given, without speaker labels), found {:?}",
                self.extractor.mode
            )));
        }
        Ok(())
    }

    /// Dimension of the vector appended to each frame.
    pub fn dimension(&self) -> usize {
        self.extractor.output_dimension()
    }

    /// What the network reads: `feature_dims` plus the vector per frame, and the vector again
    /// at every later hidden layer when `input = "layers"`.
    pub fn network_input(&self, feature_dims: usize) -> NetworkInput {
        NetworkInput {
            frame_dims: feature_dims + self.dimension(),
            layer_vector_dims: match self.input {
                VectorInput::Frames => 0,
                VectorInput::Layers => self.dimension(),
            },
        }
    }
}

/// The inputs of a network: the dimensions of each input frame (features, and the speaker
/// vector when there is one), and the dimensions of the speaker vector appended to the input of
/// every hidden layer after the first (0: none; `[speaker_vectors] input = "layers"`). A plain
/// `usize` converts to frames of that many dimensions and no layer vectors.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct NetworkInput {
    /// Dimensions of each input frame.
    pub frame_dims: usize,
    /// Dimensions of the vector each later hidden layer reads beside its input (the last
    /// `layer_vector_dims` columns of every input frame).
    pub layer_vector_dims: usize,
}

impl From<usize> for NetworkInput {
    fn from(frame_dims: usize) -> Self {
        NetworkInput {
            frame_dims,
            layer_vector_dims: 0,
        }
    }
}

/// The default front end (MFCC + Δ + ΔΔ) with per-utterance mean and variance normalisation:
/// what `isogloss transcribe` applies to each segment of a recording, whose speakers it does not
/// know, so that a model is decoded with the normalisation it was trained with.
pub fn default_features() -> FeatureConfig {
    FeatureConfig {
        cmvn: CmvnMode::Utterance,
        ..FeatureConfig::default()
    }
}

impl ModelConfig {
    /// Reads and validates a TOML configuration file. Old key spellings are read, with a warning
    /// on standard error naming the file.
    pub fn read(path: &std::path::Path) -> Result<ModelConfig, AcousticError> {
        let text = std::fs::read_to_string(path).map_err(|source| AcousticError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        // A syntax or type error is named by its line; a value out of range by the file.
        if let Err(error) = toml::from_str::<ModelConfig>(&text) {
            let line = error
                .span()
                .map_or(1, |span| text[..span.start].matches('\n').count() + 1);
            return Err(AcousticError::Line {
                path: path.to_path_buf(),
                line,
                problem: error.message().trim().to_string(),
            });
        }
        let config = Self::parse(&text).map_err(|e| AcousticError::Input {
            path: path.to_path_buf(),
            problem: e.to_string(),
        })?;
        if let Ok(table) = text.parse::<toml::Table>() {
            let model = table.get("model").and_then(toml::Value::as_table);
            let features = table.get("features").and_then(toml::Value::as_table);
            let training = table.get("training").and_then(toml::Value::as_table);
            let moved = [
                (
                    "speed_factors",
                    "write `speed_factors` under `[augmentation]`",
                ),
                (
                    "volume_range",
                    "it is ignored; the gain range is `[augmentation.gain]`",
                ),
                (
                    "spec_augment",
                    "masks are `[augmentation.masks]` (zero masks disable them)",
                ),
                (
                    "warmup_steps",
                    "it is ignored; the warm-up is `warmup_share` of all updates",
                ),
            ];
            let training_notices = moved
                .iter()
                .filter(|(key, _)| training.is_some_and(|t| t.contains_key(*key)))
                .map(|(key, what)| format!("the training key `{key}` is deprecated; {what}"));
            let notices = deprecated_layer_spellings(model.and_then(|m| m.get("layers")))
                .into_iter()
                .chain(features.map(deprecated_spellings).unwrap_or_default())
                .chain(training_notices);
            for notice in notices {
                eprintln!("warning: {}: {notice}", path.display());
            }
        }
        Ok(config)
    }

    /// Parses and validates TOML text.
    pub fn parse(text: &str) -> Result<ModelConfig, AcousticError> {
        let mut config: ModelConfig =
            toml::from_str(text).map_err(|e| AcousticError::Config(e.to_string()))?;
        // Keys of the previous release that moved to `[augmentation]`.
        let has_augmentation = text
            .parse::<toml::Table>()
            .is_ok_and(|t| t.contains_key("augmentation"));
        if let Some(factors) = config.training.speed_factors.take() {
            if !has_augmentation {
                config.augmentation.speed_factors = factors;
            }
        }
        config.training.volume_range = None;
        config.training.warmup_steps = None;
        if config.training.spec_augment.take() == Some(false) && !has_augmentation {
            config.augmentation.masks.time_masks = 0;
            config.augmentation.masks.frequency_masks = 0;
        }
        config.validate()?;
        Ok(config)
    }

    /// Checks the network, training, front-end and augmentation settings against their ranges.
    pub fn validate(&self) -> Result<(), AcousticError> {
        self.model.validate()?;
        self.training.validate()?;
        self.features.validate()?;
        self.augmentation.validate(&self.features)?;
        if let Some(vectors) = &self.speaker_vectors {
            vectors.validate()?;
        }
        Ok(())
    }

    /// Dimensions of each frame the network reads: the features, plus the speaker vector when
    /// there is one.
    pub fn input_dims(&self) -> usize {
        self.features.dims()
            + self
                .speaker_vectors
                .as_ref()
                .map_or(0, SpeakerVectors::dimension)
    }

    /// What the network reads: [`ModelConfig::input_dims`] per frame, and the speaker vector
    /// at every later hidden layer when the vectors enter every layer.
    pub fn network_input(&self) -> NetworkInput {
        match &self.speaker_vectors {
            Some(vectors) => vectors.network_input(self.features.dims()),
            None => self.features.dims().into(),
        }
    }

    /// The built-in small configuration (`configs/tdnn-small.toml`).
    pub fn small() -> ModelConfig {
        // The file is the single source of truth; it is embedded so the CLI works from anywhere.
        Self::parse(include_str!("../../../configs/tdnn-small.toml"))
            .unwrap_or_else(|e| panic!("configs/tdnn-small.toml is invalid: {e}"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_shipped_configs_are_within_the_limits() {
        for text in [
            include_str!("../../../configs/tdnn-small.toml"),
            include_str!("../../../configs/tdnn-small-robust.toml"),
            include_str!("../../../configs/tdnn-wide-robust.toml"),
            include_str!("../../../configs/tdnn-wider-robust.toml"),
            include_str!("../../../configs/tdnn-deep-robust.toml"),
            include_str!("../../../configs/tdnn-medium.toml"),
            include_str!("../../../configs/tdnn-narrow.toml"),
            include_str!("../../../configs/tdnn-small-ivector.toml"),
        ] {
            let config = ModelConfig::parse(text).unwrap();
            config.model.check_size(config.input_dims(), 100).unwrap();
        }
    }

    /// `[training] keep`: the last epoch unless written; the early-stopping config keeps the
    /// best dev loss; a misspelt value is named.
    #[test]
    fn keep_is_the_last_epoch_by_default_and_reads_both_values() {
        assert_eq!(TrainingConfig::default().keep, Keep::Last);
        let small = include_str!("../../../configs/tdnn-small.toml");
        assert_eq!(ModelConfig::parse(small).unwrap().training.keep, Keep::Last);
        let medium = ModelConfig::parse(include_str!("../../../configs/tdnn-medium.toml")).unwrap();
        assert_eq!(medium.training.keep, Keep::BestDevLoss);
        let best = small.replacen("patience = 0", "patience = 0\nkeep = \"best-dev-loss\"", 1);
        let config = ModelConfig::parse(&best).unwrap();
        assert_eq!(config.training.keep, Keep::BestDevLoss);
        // Written into model.toml and read back.
        let text = toml::to_string(&config.training).unwrap();
        assert!(text.contains("keep = \"best-dev-loss\""), "{text}");
        let wrong = small.replacen("patience = 0", "patience = 0\nkeep = \"best\"", 1);
        let error = ModelConfig::parse(&wrong).unwrap_err().to_string();
        assert!(
            error.contains("keep") && error.contains("best-dev-loss"),
            "{error}"
        );
    }

    /// `[training] average_share`: off unless written (and then not written into model.toml);
    /// a share is read and written back; outside [0, 1) or with `keep = "best-dev-loss"` it is
    /// refused with the key named.
    #[test]
    fn average_share_is_off_by_default_and_checked() {
        let small = include_str!("../../../configs/tdnn-small.toml");
        let config = ModelConfig::parse(small).unwrap();
        assert_eq!(config.training.average_share, 0.0);
        let text = toml::to_string(&config.training).unwrap();
        assert!(!text.contains("average_share"), "{text}");
        let averaged = small.replacen("patience = 0", "patience = 0\naverage_share = 0.1", 1);
        let config = ModelConfig::parse(&averaged).unwrap();
        assert_eq!(config.training.average_share, 0.1);
        let text = toml::to_string(&config.training).unwrap();
        assert!(text.contains("average_share = 0.1"), "{text}");
        for (value, extra) in [
            ("1.0", ""),
            ("-0.1", ""),
            ("0.2", "\nkeep = \"best-dev-loss\""),
        ] {
            let wrong = small.replacen(
                "patience = 0",
                &format!("patience = 0\naverage_share = {value}{extra}"),
                1,
            );
            let error = ModelConfig::parse(&wrong).unwrap_err().to_string();
            assert!(error.contains("[training] average_share"), "{error}");
        }
    }

    /// `[training] matmul_precision`: f32 unless written (so configs and model.toml files
    /// written before the key read as f32); "bf16" reads and is written back, as in the shipped
    /// demo model's model.toml; a misspelt value is named with both spellings.
    #[test]
    fn matmul_precision_is_f32_by_default_and_reads_bf16() {
        assert_eq!(
            TrainingConfig::default().matmul_precision,
            MatmulPrecision::F32
        );
        let small = include_str!("../../../configs/tdnn-small.toml");
        let config = ModelConfig::parse(small).unwrap();
        assert_eq!(config.training.matmul_precision, MatmulPrecision::F32);
        let older = include_str!("../../../configs/tdnn-wide-robust.toml");
        assert!(!older.contains("matmul_precision"));
        let config = ModelConfig::parse(older).unwrap();
        assert_eq!(config.training.matmul_precision, MatmulPrecision::F32);
        let shipped = include_str!("../../../models/demo/model.toml");
        assert!(shipped.contains("matmul_precision = \"bf16\""));
        let with = small.replacen(
            "patience = 0",
            "patience = 0\nmatmul_precision = \"bf16\"",
            1,
        );
        let config = ModelConfig::parse(&with).unwrap();
        assert_eq!(config.training.matmul_precision, MatmulPrecision::Bf16);
        let text = toml::to_string(&config.training).unwrap();
        assert!(text.contains("matmul_precision = \"bf16\""), "{text}");
        let wrong = small.replacen(
            "patience = 0",
            "patience = 0\nmatmul_precision = \"f16\"",
            1,
        );
        let error = ModelConfig::parse(&wrong).unwrap_err().to_string();
        assert!(
            error.contains("matmul_precision") && error.contains("bf16") && error.contains("f32"),
            "{error}"
        );
        // On this CPU bf16 is used exactly when the instructions are there.
        let used = MatmulPrecision::Bf16.supported();
        assert_eq!(
            used == MatmulPrecision::Bf16,
            crate::fused::bf16_available()
        );
        assert_eq!(MatmulPrecision::F32.supported(), MatmulPrecision::F32);
    }

    /// `[speaker_vectors]`: off unless written; the shipped table is the extractor's defaults;
    /// a wrong key or value is named with its table.
    #[test]
    fn the_speaker_vectors_table_reads_and_bad_settings_name_their_key() {
        let small = ModelConfig::small();
        assert_eq!(small.speaker_vectors, None);
        assert_eq!(small.input_dims(), 39);
        let text = include_str!("../../../configs/tdnn-small-ivector.toml");
        let config = ModelConfig::parse(text).unwrap();
        let vectors = config.speaker_vectors.clone().unwrap();
        assert_eq!(vectors.input, VectorInput::Frames);
        assert_eq!(vectors.extractor, ExtractorConfig::default());
        assert_eq!(config.input_dims(), 39 + 40);
        // Everything else is the narrow recipe.
        let narrow = ModelConfig::parse(include_str!("../../../configs/tdnn-narrow.toml")).unwrap();
        assert_eq!(
            ModelConfig {
                speaker_vectors: None,
                ..config
            },
            narrow
        );
        for (old, new, expected) in [
            (
                "dimension = 40",
                "dimenson = 40",
                "unknown field `dimenson`",
            ),
            (
                "input = \"frames\"",
                "input = \"bias\"",
                "unknown variant `bias`",
            ),
            (
                "input = \"frames\"",
                "inputs = \"frames\"",
                "unknown field `inputs`",
            ),
            (
                "mode = \"online\"",
                "mode = \"speaker\"",
                "speaker_vectors.extractor.mode: expected \"online\"",
            ),
            (
                "dimension = 40",
                "dimension = 0",
                "speaker_vectors.extractor: ",
            ),
            ("gaussians = 128", "gaussians = 0", "`ubm.gaussians`"),
        ] {
            assert!(text.contains(old), "{old}");
            let message = ModelConfig::parse(&text.replacen(old, new, 1))
                .unwrap_err()
                .to_string();
            assert!(message.contains(expected), "{expected}: {message}");
        }
    }

    #[test]
    fn sizes_beyond_their_limits_are_errors_naming_the_key() {
        let small = include_str!("../../../configs/tdnn-small.toml");
        for (text, expected) in [
            (
                small.replacen("taps = [-2, -1, 0, 1, 2]", "taps = [-2000000000, 0]", 1),
                "taps must lie within -64 to 64",
            ),
            (
                small.replacen("width = 320 }", "width = 100000 }", 1),
                "width must be from 1 to 16384",
            ),
            (
                small.replacen("keep_every = 3", "keep_every = 1000", 1),
                "at most 64",
            ),
            (
                small.replacen("batch_frames = 5000", "batch_frames = 0", 1),
                "batch_frames",
            ),
            (
                small.replacen(
                    "speed_factors = [0.9, 1.0, 1.1]",
                    "speed_factors = [5.0]",
                    1,
                ),
                "factors from 0.5 to 2.0",
            ),
            (
                small.replacen("snr_db = [8.0, 25.0]", "snr_db = [-5.0, 25.0]", 1),
                "snr_db",
            ),
            (
                small.replacen("warp_factor = [0.9, 1.1]", "warp_factor = [0.0, 1.1]", 1),
                "warp_factor",
            ),
            (
                small.replacen("learning_rate = 0.003", "learning_rate = nan", 1),
                "learning_rate",
            ),
            (
                small.replacen("epochs = 40", "epochs = 100000000000", 1),
                "epochs",
            ),
        ] {
            let message = ModelConfig::parse(&text).unwrap_err().to_string();
            assert!(message.contains(expected), "{expected}: {message}");
        }
        let wide = TdnnConfig {
            layers: vec![LayerConfig {
                taps: (-64..=64).collect(),
                width: MAX_WIDTH,
                keep_every: 1,
            }],
            normalization: Normalization::Layer,
            dropout: 0.0,
        };
        wide.validate().unwrap();
        let message = wide.check_size(1000, 100).unwrap_err().to_string();
        assert!(message.contains("at most 200000000"), "{message}");
    }

    #[test]
    fn the_small_config_writes_out_the_augmentation_defaults() {
        let small = ModelConfig::small();
        assert_eq!(small.augmentation, Augmentation::default());
        assert_eq!(small.model.layers[0].keep_every, 3);
        assert_eq!(small.model.normalization, Normalization::Batch);
        assert_eq!(small.features.cmvn, isogloss_features::CmvnMode::Utterance);
        let mut narrow =
            ModelConfig::parse(include_str!("../../../configs/tdnn-narrow.toml")).unwrap();
        for layer in [3, 4] {
            assert_eq!(narrow.model.layers[layer].taps, vec![-1, 0, 1]);
            assert_eq!(small.model.layers[layer].taps, vec![-3, 0, 3]);
            narrow.model.layers[layer].taps = vec![-3, 0, 3];
        }
        assert_eq!(
            narrow, small,
            "the narrow recipe is the small one but for the taps of layers 4 and 5"
        );
    }

    #[test]
    fn old_training_keys_still_read() {
        let old = "[model]\nnormalization = \"layer\"\ndropout = 0.0\nlayers = [{ taps = [0], width = 8 }]\n[training]\nwarmup_steps = 150\nspeed_factors = [1.0]\nspec_augment = false\nvolume_range = 1.5\n";
        let config = ModelConfig::parse(old).unwrap();
        assert_eq!(config.augmentation.speed_factors, vec![1.0]);
        assert_eq!(config.augmentation.masks.time_masks, 0);
        assert_eq!(config.training.warmup_steps, None);
    }

    /// A configuration (or a `model.toml`) without an `[augmentation.codec]` table never draws the
    /// codec; a table with only some keys takes the library's defaults for the others; bad values
    /// name their key.
    #[test]
    fn the_codec_is_off_without_its_table() {
        let layers = "[model]\nnormalization = \"batch\"\ndropout = 0.0\nlayers = [{ taps = [0], width = 8 }]\n";
        let without = ModelConfig::parse(&format!(
            "{layers}[augmentation.noise]\nprobability = 0.2\n"
        ))
        .unwrap();
        assert_eq!(without.augmentation.codec.probability, 0.0);
        assert!(!Augmentation::none().has_waveform_steps());
        let with = ModelConfig::parse(&format!(
            "{layers}[augmentation.codec]\nband_snr_db = [10.0, 12.0]\n"
        ))
        .unwrap();
        assert_eq!(with.augmentation.codec.probability, 0.2);
        assert_eq!(with.augmentation.codec.band_snr_db, [10.0, 12.0]);
        assert_eq!(with.augmentation.codec.cutoff_hz, [4_000.0, 7_000.0]);
        assert_eq!(with.augmentation.waveform().codec, with.augmentation.codec);
        let message = ModelConfig::parse(&format!(
            "{layers}[augmentation.codec]\ncutoff_hz = [7000.0, 4000.0]\n"
        ))
        .unwrap_err()
        .to_string();
        assert!(
            message.contains("augmentation.codec.cutoff_hz"),
            "{message}"
        );
    }

    /// Re-voicing, like the codec, is off without its table; with it the missing keys take the
    /// library's defaults, the model file carries the table, and bad values name their key.
    #[test]
    fn revoicing_is_off_without_its_table() {
        let layers = "[model]\nnormalization = \"batch\"\ndropout = 0.0\nlayers = [{ taps = [0], width = 8 }]\n";
        let without = ModelConfig::parse(layers).unwrap();
        assert_eq!(without.augmentation.revoice.probability, 0.0);
        assert_eq!(Augmentation::default().revoice.probability, 0.0);
        let with = ModelConfig::parse(&format!(
            "{layers}[augmentation.revoice]\nprobability = 0.3\nf0_hz = [90.0, 250.0]\n"
        ))
        .unwrap();
        assert_eq!(with.augmentation.revoice.probability, 0.3);
        assert_eq!(with.augmentation.revoice.f0_hz, [90.0, 250.0]);
        assert_eq!(with.augmentation.revoice.bandwidth_factor, [0.95, 1.0]);
        assert!(with.augmentation.has_waveform_steps());
        assert_eq!(
            with.augmentation.waveform().revoice,
            with.augmentation.revoice
        );
        let written = toml::to_string(&with).unwrap();
        assert_eq!(ModelConfig::parse(&written).unwrap(), with);
        let message = ModelConfig::parse(&format!(
            "{layers}[augmentation.revoice]\nbandwidth_factor = [0.5, 1.0]\n"
        ))
        .unwrap_err()
        .to_string();
        assert!(
            message.contains("augmentation.revoice.bandwidth_factor") && message.contains("0.5"),
            "{message}"
        );
    }
}

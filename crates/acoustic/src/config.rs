//! Architecture and training settings, read from TOML (`configs/tdnn-*.toml`).

use isogloss_features::{deprecated_spellings, CmvnMode, FeatureConfig};
use serde::{Deserialize, Serialize};

use crate::AcousticError;

/// How hidden activations are normalised.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Normalization {
    /// Per frame over the hidden units (independent of batch composition and padding).
    Layer,
    /// No normalisation.
    None,
}

/// One hidden TDNN layer: the input frames at the `taps` side by side, affine, ReLU,
/// normalisation, dropout. Written `{ taps = [-1, 0, 1], width = 320, keep_every = 3 }`; the
/// spellings of the previous release (`offsets`, `dims`, `subsample`) are still read, with a
/// deprecation warning ([`deprecated_layer_spellings`]).
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
/// Largest `warmup_steps`.
pub const MAX_WARMUP_STEPS: usize = 100_000_000;
/// Most speed-perturbation factors.
pub const MAX_SPEED_FACTORS: usize = 16;

/// The network: hidden layers then a final affine layer over the units (blank included).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TdnnConfig {
    /// Hidden layers in order.
    pub layers: Vec<LayerConfig>,
    /// Normalisation after each hidden ReLU.
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
    pub fn check_size(&self, input_dims: usize, units: usize) -> Result<(), AcousticError> {
        let count = self.parameter_count(input_dims, units) as u64;
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

    /// Number of trainable parameters for `input_dims` features and `units` outputs.
    pub fn parameter_count(&self, input_dims: usize, units: usize) -> usize {
        // Saturating: a description read from a file may ask for more than a usize holds.
        let mut count = 0usize;
        let mut dims = input_dims;
        for layer in &self.layers {
            let weights = layer
                .taps
                .len()
                .saturating_mul(dims)
                .saturating_mul(layer.width);
            count = count.saturating_add(weights).saturating_add(layer.width);
            if self.normalization == Normalization::Layer {
                count = count.saturating_add(layer.width.saturating_mul(2));
            }
            dims = layer.width;
        }
        count
            .saturating_add(dims.saturating_mul(units))
            .saturating_add(units)
    }
}

/// Optimisation settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct TrainingConfig {
    /// Passes over the training data (the `--epochs` flag overrides it).
    pub epochs: usize,
    /// Upper bound on input frames (padding included) per batch.
    pub batch_frames: usize,
    /// Peak AdamW learning rate.
    pub learning_rate: f64,
    /// Linear warm-up from zero over this many updates.
    pub warmup_steps: usize,
    /// After warm-up the rate decays as `peak · sqrt(warmup / step)` (inverse square root).
    pub decay: bool,
    /// AdamW decoupled weight decay.
    pub weight_decay: f64,
    /// Global gradient norm clip.
    pub clip_norm: f64,
    /// Stop after this many epochs without a better dev loss.
    pub patience: usize,
    /// Speed perturbation factors drawn uniformly per utterance and epoch (1.0 = unchanged);
    /// empty disables it.
    pub speed_factors: Vec<f32>,
    /// Volume perturbation: gain drawn uniformly in `[1/g, g]`; 1.0 disables it.
    pub volume_range: f32,
    /// SpecAugment on the training features.
    pub spec_augment: bool,
}

impl Default for TrainingConfig {
    fn default() -> Self {
        TrainingConfig {
            epochs: 20,
            batch_frames: 12_000,
            learning_rate: 2e-3,
            warmup_steps: 200,
            decay: true,
            weight_decay: 1e-2,
            clip_norm: 5.0,
            patience: 4,
            speed_factors: vec![0.9, 1.0, 1.1],
            volume_range: 1.5,
            spec_augment: true,
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
        if self.warmup_steps > MAX_WARMUP_STEPS {
            return invalid(
                "warmup_steps",
                "at most 100000000",
                self.warmup_steps.to_string(),
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
        if self.speed_factors.len() > MAX_SPEED_FACTORS {
            return invalid(
                "speed_factors",
                "a list of at most 16 factors",
                format!("{} factors", self.speed_factors.len()),
            );
        }
        for &factor in &self.speed_factors {
            if isogloss_audio::check_speed_factor(f64::from(factor)).is_err() {
                return invalid(
                    "speed_factors",
                    "factors from 0.5 to 2.0",
                    factor.to_string(),
                );
            }
        }
        if !(1.0..=100.0).contains(&self.volume_range) {
            return invalid(
                "volume_range",
                "from 1 to 100",
                self.volume_range.to_string(),
            );
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
}

/// The default front end (MFCC + Δ + ΔΔ) with per-speaker mean and variance normalisation.
pub fn default_features() -> FeatureConfig {
    FeatureConfig {
        cmvn: CmvnMode::Speaker,
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
            let notices = deprecated_layer_spellings(model.and_then(|m| m.get("layers")))
                .into_iter()
                .chain(features.map(deprecated_spellings).unwrap_or_default());
            for notice in notices {
                eprintln!("warning: {}: {notice}", path.display());
            }
        }
        Ok(config)
    }

    /// Parses and validates TOML text.
    pub fn parse(text: &str) -> Result<ModelConfig, AcousticError> {
        let config: ModelConfig =
            toml::from_str(text).map_err(|e| AcousticError::Config(e.to_string()))?;
        config.validate()?;
        Ok(config)
    }

    /// Checks the network, training and front-end settings against their ranges.
    pub fn validate(&self) -> Result<(), AcousticError> {
        self.model.validate()?;
        self.training.validate()?;
        self.features.validate()?;
        Ok(())
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
            include_str!("../../../configs/tdnn-medium.toml"),
            include_str!("../../../configs/tdnn-demo.toml"),
        ] {
            let config = ModelConfig::parse(text).unwrap();
            config
                .model
                .check_size(config.features.dims(), 100)
                .unwrap();
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
                small.replacen("batch_frames = 12000", "batch_frames = 0", 1),
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
                small.replacen("volume_range = 1.5", "volume_range = 0.5", 1),
                "volume_range",
            ),
            (
                small.replacen("learning_rate = 0.002", "learning_rate = nan", 1),
                "learning_rate",
            ),
            (
                small.replacen("epochs = 20", "epochs = 100000000000", 1),
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
}

//! The extractor's settings, read from TOML (a table of the training config), validated once.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::SpeakerError;

/// How the UBM's Gaussians are initialised before EM.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum UbmInit {
    /// Binary splitting: one Gaussian with the global mean and variance, then every Gaussian
    /// (the heaviest ones, in the last round) split in two with means moved ±0.2 standard
    /// deviations, `init_iterations` EM iterations after each split. Deterministic.
    #[default]
    Split,
    /// k-means++ seeding (seeded with `seed`) and `init_iterations` Lloyd iterations; each
    /// cluster becomes a Gaussian with its mean, variance and share of the frames.
    Kmeans,
}

/// Which frames an i-vector summarises, when the vectors are handed to a consumer frame by frame
/// ([`crate::IvectorExtractor::frame_ivectors`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum ExtractionMode {
    /// One vector per speaker, from the statistics of all that speaker's utterances.
    Speaker,
    /// One vector per utterance, from its own frames.
    Utterance,
    /// A running vector over the last `window_seconds`, refreshed every `period_frames` frames,
    /// using only frames up to the current one (see [`crate::OnlineIvectors`]); needs no labels.
    #[default]
    Online,
}

/// Settings of the universal background model: a diagonal-covariance Gaussian mixture.
///
/// Missing TOML keys take the defaults; unknown keys are an error.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct UbmConfig {
    /// Number of Gaussians.
    pub gaussians: usize,
    /// EM iterations at the full number of Gaussians.
    pub iterations: usize,
    /// `"split"` (binary splitting, default) or `"kmeans"`.
    pub init: UbmInit,
    /// EM iterations after each split, or Lloyd iterations of k-means.
    pub init_iterations: usize,
    /// Variance floor as a fraction of the global variance of each dimension: after every M-step,
    /// no variance is below `variance_floor × global variance` (0 turns it off).
    pub variance_floor: f64,
    /// Added to every variance after the M-step, as scikit-learn's `reg_covar` does (default 0).
    /// Unlike the floor it is not part of a maximisation, so it can lower the log-likelihood by
    /// about its own size from one iteration to the next.
    pub variance_regularization: f64,
    /// Frames the UBM is trained on at most: a larger pool is thinned to every k-th frame with
    /// the smallest k that fits (0: all frames).
    pub max_frames: usize,
    /// Seed of k-means++ seeding.
    pub seed: u64,
}

impl Default for UbmConfig {
    fn default() -> Self {
        UbmConfig {
            gaussians: 128,
            iterations: 8,
            init: UbmInit::Split,
            init_iterations: 3,
            variance_floor: 0.01,
            variance_regularization: 0.0,
            max_frames: 500_000,
            seed: 1,
        }
    }
}

/// Settings of the i-vector extractor: the UBM (`[ubm]` table), the total-variability model,
/// the extraction mode and the post-processing of the vectors.
///
/// Missing TOML keys take the defaults; unknown keys are an error, so that a misspelt setting is
/// not silently ignored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ExtractorConfig {
    /// Dimension R of the i-vector (the rank of the total-variability matrix T).
    pub dimension: usize,
    /// EM iterations of T.
    pub iterations: usize,
    /// Whether each T iteration ends with the minimum-divergence step (T ← T·chol(E[wwᵀ]) averaged
    /// over utterances), which keeps the prior of w at N(0, I) as the data see it.
    pub minimum_divergence: bool,
    /// Keep only the `top_gaussians` most likely Gaussians of every frame (posteriors renormalised
    /// among them) when collecting statistics; 0 (or at least `ubm.gaussians`) keeps all. It
    /// speeds up the statistics and the online window, which then touch `top_gaussians` rows per
    /// frame instead of all and skip the exponentials of the others; a frame's posterior mass
    /// lies almost entirely on a handful of Gaussians.
    pub top_gaussians: usize,
    /// The statistics of an item (utterance, speaker, online window) use its frames 0, s, 2s, …
    /// (s = `frame_stride`, counted from the start of the utterance or stream), in training and
    /// extraction alike. Neighbouring 10 ms frames overlap by 60 % and are nearly equal, so a
    /// stride of 2 or 3 loses little of what the statistics say about the speaker and divides
    /// the per-frame cost of extraction by the stride. 1 uses every frame.
    pub frame_stride: usize,
    /// Utterances with fewer frames are left out of training and refused by per-utterance
    /// extraction (the online stream takes any number).
    pub min_frames: usize,
    /// `"online"` (default), `"utterance"` or `"speaker"`: see [`ExtractionMode`].
    pub mode: ExtractionMode,
    /// Online mode: length of the window the running i-vector summarises, in seconds.
    pub window_seconds: f64,
    /// Online mode: the vector is recomputed every `period_frames` frames.
    pub period_frames: usize,
    /// Subtract the mean of the training utterances' i-vectors.
    pub subtract_mean: bool,
    /// Project onto the leading `lda_dimension` linear-discriminant directions between training
    /// speakers (0: no LDA). Needs more training speakers than this.
    pub lda_dimension: usize,
    /// Scale every output vector to length √(output dimension). Off by default: an online window
    /// with little speech has a vector near the prior's mean, and normalising its length would
    /// blow that near-zero vector up to full length in an arbitrary direction.
    pub length_normalize: bool,
    /// Seed of the random initial T.
    pub seed: u64,
    /// The universal background model.
    pub ubm: UbmConfig,
}

impl Default for ExtractorConfig {
    fn default() -> Self {
        ExtractorConfig {
            dimension: 40,
            iterations: 6,
            minimum_divergence: true,
            top_gaussians: 16,
            frame_stride: 3,
            min_frames: 10,
            mode: ExtractionMode::Online,
            window_seconds: 10.0,
            period_frames: 50,
            subtract_mean: true,
            lda_dimension: 0,
            length_normalize: false,
            seed: 1,
            ubm: UbmConfig::default(),
        }
    }
}

fn invalid(key: &'static str, expected: impl Into<String>, found: impl ToString) -> SpeakerError {
    SpeakerError::InvalidConfig {
        key,
        expected: expected.into(),
        found: found.to_string(),
    }
}

impl UbmConfig {
    /// Checks every setting.
    pub fn validate(&self) -> Result<(), SpeakerError> {
        if self.gaussians == 0 {
            return Err(invalid("ubm.gaussians", "at least 1", 0));
        }
        if self.iterations == 0 {
            return Err(invalid("ubm.iterations", "at least 1", 0));
        }
        if !(0.0..1.0).contains(&self.variance_floor) {
            return Err(invalid(
                "ubm.variance_floor",
                "a fraction of the global variance in [0, 1)",
                self.variance_floor,
            ));
        }
        if !(self.variance_regularization >= 0.0 && self.variance_regularization.is_finite()) {
            return Err(invalid(
                "ubm.variance_regularization",
                "a finite number ≥ 0",
                self.variance_regularization,
            ));
        }
        if self.max_frames != 0 && self.max_frames < self.gaussians {
            return Err(invalid(
                "ubm.max_frames",
                format!("0 (all) or at least ubm.gaussians ({})", self.gaussians),
                self.max_frames,
            ));
        }
        Ok(())
    }
}

impl ExtractorConfig {
    /// Checks every setting, the `[ubm]` table included.
    pub fn validate(&self) -> Result<(), SpeakerError> {
        self.ubm.validate()?;
        if self.dimension == 0 {
            return Err(invalid("dimension", "at least 1", 0));
        }
        if self.iterations == 0 {
            return Err(invalid("iterations", "at least 1", 0));
        }
        if self.frame_stride == 0 {
            return Err(invalid("frame_stride", "at least 1 (every frame)", 0));
        }
        if self.min_frames == 0 {
            return Err(invalid("min_frames", "at least 1", 0));
        }
        if !(self.window_seconds > 0.0 && self.window_seconds.is_finite()) {
            return Err(invalid(
                "window_seconds",
                "a positive number of seconds",
                self.window_seconds,
            ));
        }
        if self.period_frames == 0 {
            return Err(invalid("period_frames", "at least 1", 0));
        }
        if self.lda_dimension > self.dimension {
            return Err(invalid(
                "lda_dimension",
                format!("0 (no LDA) or at most dimension ({})", self.dimension),
                self.lda_dimension,
            ));
        }
        Ok(())
    }

    /// Parses and validates a TOML config (the extractor's own table).
    pub fn from_toml_str(text: &str, path: &Path) -> Result<Self, SpeakerError> {
        let invalid_file = |message: String| SpeakerError::ConfigFile {
            path: path.to_path_buf(),
            message,
        };
        // One line: the line and the parser's message, without the parser's excerpt of the file.
        let config: ExtractorConfig = toml::from_str(text).map_err(|error| {
            let line = error
                .span()
                .map_or(1, |span| text[..span.start].matches('\n').count() + 1);
            SpeakerError::ConfigSyntax {
                path: path.to_path_buf(),
                line,
                message: error.message().trim().to_string(),
            }
        })?;
        config
            .validate()
            .map_err(|error| invalid_file(error.to_string()))?;
        Ok(config)
    }

    /// Reads, parses and validates a TOML config file.
    pub fn from_toml_file(path: &Path) -> Result<Self, SpeakerError> {
        let text = std::fs::read_to_string(path).map_err(|source| SpeakerError::Io {
            path: path.to_path_buf(),
            action: "reading",
            source,
        })?;
        Self::from_toml_str(&text, path)
    }

    /// The config as TOML, every setting spelled out.
    pub fn to_toml_string(&self) -> String {
        // A plain struct of numbers, booleans and enums always serialises.
        toml::to_string(self).unwrap_or_default()
    }

    /// Dimension of the vectors handed out: `lda_dimension` when LDA is on, else `dimension`.
    pub fn output_dimension(&self) -> usize {
        if self.lda_dimension > 0 {
            self.lda_dimension
        } else {
            self.dimension
        }
    }

    /// The online window in frames, `round(window_seconds / frame_shift_seconds)`, at least 1.
    pub fn window_frames(&self, frame_shift_seconds: f64) -> usize {
        ((self.window_seconds / frame_shift_seconds).round() as usize).max(1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid_and_round_trip_through_toml() {
        let config = ExtractorConfig::default();
        config.validate().unwrap();
        let text = config.to_toml_string();
        assert_eq!(
            ExtractorConfig::from_toml_str(&text, Path::new("x.toml")).unwrap(),
            config
        );
        // 10 s at the 10 ms frame shift of the default front end.
        assert_eq!(config.window_frames(0.01), 1000);
        assert_eq!(config.output_dimension(), 40);
    }

    #[test]
    fn missing_keys_take_defaults_and_nested_ubm_table_reads() {
        let config = ExtractorConfig::from_toml_str(
            "dimension = 16\nmode = \"speaker\"\n[ubm]\ngaussians = 32\ninit = \"kmeans\"\n",
            Path::new("x.toml"),
        )
        .unwrap();
        assert_eq!(config.dimension, 16);
        assert_eq!(config.mode, ExtractionMode::Speaker);
        assert_eq!(config.ubm.gaussians, 32);
        assert_eq!(config.ubm.init, UbmInit::Kmeans);
        assert_eq!(config.ubm.iterations, UbmConfig::default().iterations);
    }

    #[test]
    fn bad_settings_name_the_key_file_and_line() {
        let error =
            ExtractorConfig::from_toml_str("dimension = 8\ndimenson = 9\n", Path::new("t.toml"))
                .unwrap_err()
                .to_string();
        assert!(
            error.contains("t.toml") && error.contains("line 2") && error.contains("dimenson"),
            "{error}"
        );
        let error = ExtractorConfig::from_toml_str("[ubm]\ngaussians = 0\n", Path::new("t.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("t.toml")
                && error.contains("`ubm.gaussians`")
                && error.contains("found 0"),
            "{error}"
        );
        let error = ExtractorConfig::from_toml_str("mode = \"sentence\"", Path::new("t.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("sentence") && error.contains("online"),
            "{error}"
        );
        for (text, key) in [
            ("dimension = 0", "`dimension`"),
            ("iterations = 0", "`iterations`"),
            ("min_frames = 0", "`min_frames`"),
            ("frame_stride = 0", "`frame_stride`"),
            ("window_seconds = -1.0", "`window_seconds`"),
            ("period_frames = 0", "`period_frames`"),
            ("lda_dimension = 50", "`lda_dimension`"),
            ("[ubm]\nvariance_floor = 1.5", "`ubm.variance_floor`"),
            (
                "[ubm]\nvariance_regularization = -1.0",
                "`ubm.variance_regularization`",
            ),
            ("[ubm]\nmax_frames = 5", "`ubm.max_frames`"),
            ("[ubm]\niterations = 0", "`ubm.iterations`"),
        ] {
            let error = ExtractorConfig::from_toml_str(text, Path::new("t.toml"))
                .unwrap_err()
                .to_string();
            assert!(error.contains(key), "{text}: {error}");
        }
    }
}

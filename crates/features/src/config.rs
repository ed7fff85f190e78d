//! The front-end settings, read from TOML, validated once at the edge.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::FeatureError;

/// Which features the front end produces.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum FeatureKind {
    /// Mel-frequency cepstral coefficients c0…c(n−1) (the DCT of the log-mel energies).
    #[default]
    Mfcc,
    /// Log-mel filterbank energies: the same pipeline stopped before the DCT. The old spelling
    /// `"fbank"` is read for one release, with a deprecation warning.
    #[serde(rename = "logmel", alias = "fbank")]
    LogMel,
}

/// Which mean and variance normalisation the pipeline applies after extraction.
///
/// [`crate::FeatureExtractor::extract`] itself never normalises, so that its output is exactly the
/// configured front end; consumers (the `features` command, training, decoding) apply this setting
/// with [`crate::Cmvn`] and [`crate::SpeakerCmvnStats`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum CmvnMode {
    /// No normalisation (the default front end).
    #[default]
    None,
    /// Statistics from each utterance alone.
    Utterance,
    /// Statistics pooled over all utterances of a speaker.
    Speaker,
}

/// Settings of the acoustic front end. `Default` is the default front end specified in
/// `docs/features.md`: 16 kHz, pre-emphasis 0.97, 400-sample frames every 160 samples, symmetric
/// Hamming window, 512-point FFT power spectrum, 40 mel filters (O'Shaughnessy's mel formula)
/// over 20–8000 Hz, natural log floored at 1e-10, orthonormal DCT-II c0…c12, Δ and ΔΔ by
/// regression over ±2 frames: 39 dimensions.
///
/// Missing TOML keys take these defaults; unknown keys are an error, so that a misspelt setting
/// is not silently ignored. The spellings of the previous release ([`DEPRECATED_KEYS`]) are still
/// read, with a warning from [`deprecated_spellings`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct FeatureConfig {
    /// `"mfcc"` (default) or `"logmel"`.
    pub kind: FeatureKind,
    /// Sample rate the samples are at, in Hz (the audio stage delivers 16 000).
    pub sample_rate: u32,
    /// Pre-emphasis coefficient a: y[0] = x[0], y[n] = x[n] − a·x[n−1]; 0 turns it off.
    #[serde(alias = "preemphasis")]
    pub emphasis: f64,
    /// Samples per analysis window (400 = 25 ms at 16 kHz).
    #[serde(alias = "frame_length")]
    pub window_samples: usize,
    /// Samples between window starts (160 = 10 ms at 16 kHz).
    #[serde(alias = "frame_shift")]
    pub hop_samples: usize,
    /// FFT length; frames are zero-padded to it. Must be even and at least `window_samples`.
    pub fft_size: usize,
    /// Number of triangular mel filters.
    #[serde(alias = "mel_bins")]
    pub mel_filters: usize,
    /// Lower edge of the lowest mel filter, in Hz.
    #[serde(alias = "low_hz")]
    pub band_low_hz: f64,
    /// Upper edge of the highest mel filter, in Hz (at most half the sample rate).
    #[serde(alias = "high_hz")]
    pub band_high_hz: f64,
    /// Mel energies below this are raised to it before the natural log.
    pub log_floor: f64,
    /// Cepstral coefficients kept (c0…c(n−1)); used by `kind = "mfcc"` only.
    pub cepstra: usize,
    /// Δ features are the slope of a least-squares line over ±`slope_reach` frames.
    #[serde(alias = "delta_window")]
    pub slope_reach: usize,
    /// 0: static features only; 1: add Δ; 2: add Δ and ΔΔ. When absent: 2 for MFCC, 0 for log-mel
    /// (log-mel feeds models that see a wide context anyway, and 40 stays 40).
    pub deltas: Option<usize>,
    /// Normalisation applied after extraction (see [`CmvnMode`]).
    pub cmvn: CmvnMode,
    /// Whether CMVN also scales every dimension to unit variance (else it only removes the mean).
    #[serde(alias = "normalize_variance")]
    pub unit_variance: bool,
}

impl Default for FeatureConfig {
    fn default() -> Self {
        FeatureConfig {
            kind: FeatureKind::Mfcc,
            sample_rate: 16_000,
            emphasis: 0.97,
            window_samples: 400,
            hop_samples: 160,
            fft_size: 512,
            mel_filters: 40,
            band_low_hz: 20.0,
            band_high_hz: 8000.0,
            log_floor: 1e-10,
            cepstra: 13,
            slope_reach: 2,
            deltas: None,
            cmvn: CmvnMode::None,
            unit_variance: true,
        }
    }
}

/// Largest `fft_size` (and so `window_samples`): 65 536 samples, 4 s at 16 kHz, far beyond any
/// speech front end; the FFT plan and window are built from it.
pub const MAX_FFT_SIZE: usize = 1 << 16;

/// Largest `hop_samples`.
pub const MAX_HOP_SAMPLES: usize = 1 << 16;

/// Largest `mel_filters` (speech front ends use 20 to 128).
pub const MAX_MEL_FILTERS: usize = 1024;

/// Largest `slope_reach` (frames on each side of a Δ regression; 2 is usual).
pub const MAX_SLOPE_REACH: usize = 100;

/// Supported `sample_rate` range (Hz), the same as the audio stage's.
pub const SAMPLE_RATE_RANGE: std::ops::RangeInclusive<u32> = 1_000..=384_000;

/// Feature-setting keys of the previous release and the keys that replace them. The old keys are
/// still read for one release, with a deprecation warning.
pub const DEPRECATED_KEYS: [(&str, &str); 8] = [
    ("preemphasis", "emphasis"),
    ("frame_length", "window_samples"),
    ("frame_shift", "hop_samples"),
    ("mel_bins", "mel_filters"),
    ("low_hz", "band_low_hz"),
    ("high_hz", "band_high_hz"),
    ("delta_window", "slope_reach"),
    ("normalize_variance", "unit_variance"),
];

/// One deprecation notice per old spelling in a table of feature settings (a feature config file,
/// or the `[features]` table of a model or training config): the keys of [`DEPRECATED_KEYS`] and
/// the value `kind = "fbank"`. Callers print them as warnings, naming the file.
pub fn deprecated_spellings(table: &toml::Table) -> Vec<String> {
    let mut notices: Vec<String> = DEPRECATED_KEYS
        .iter()
        .filter(|(old, _)| table.contains_key(*old))
        .map(|(old, new)| format!("the feature key `{old}` is deprecated; write `{new}`"))
        .collect();
    if table.get("kind").and_then(toml::Value::as_str) == Some("fbank") {
        notices.push("`kind = \"fbank\"` is deprecated; write `kind = \"logmel\"`".into());
    }
    notices
}

impl FeatureConfig {
    /// The default front end with `kind = "logmel"`: 40 log-mel energies, no deltas.
    pub fn logmel() -> Self {
        FeatureConfig {
            kind: FeatureKind::LogMel,
            ..FeatureConfig::default()
        }
    }

    /// Parses and validates a TOML config. Old spellings of the keys are read, with a warning on
    /// standard error naming the file (see [`deprecated_spellings`]).
    pub fn from_toml_str(text: &str, path: &Path) -> Result<Self, FeatureError> {
        let invalid = |message: String| FeatureError::ConfigFile {
            path: path.to_path_buf(),
            message,
        };
        // One line: the line and the parser's message, without the parser's excerpt of the file.
        let config: FeatureConfig = toml::from_str(text).map_err(|error| {
            let line = error
                .span()
                .map_or(1, |span| text[..span.start].matches('\n').count() + 1);
            FeatureError::ConfigSyntax {
                path: path.to_path_buf(),
                line,
                message: error.message().trim().to_string(),
            }
        })?;
        if let Ok(table) = text.parse::<toml::Table>() {
            for notice in deprecated_spellings(&table) {
                eprintln!("warning: {}: {notice}", path.display());
            }
        }
        config
            .validate()
            .map_err(|error| invalid(error.to_string()))?;
        Ok(config)
    }

    /// Reads, parses and validates a TOML config file.
    pub fn from_toml_file(path: &Path) -> Result<Self, FeatureError> {
        let text = std::fs::read_to_string(path).map_err(|source| FeatureError::Io {
            path: path.to_path_buf(),
            action: "reading",
            source,
        })?;
        Self::from_toml_str(&text, path)
    }

    /// The config as TOML, every setting spelled out.
    pub fn to_toml_string(&self) -> String {
        let mut spelled_out = self.clone();
        spelled_out.deltas = Some(self.delta_order());
        // Serialising a plain struct of numbers, strings and enums cannot fail.
        toml::to_string(&spelled_out).unwrap_or_default()
    }

    /// How many delta orders are appended (0, 1 or 2), after applying the per-kind default.
    pub fn delta_order(&self) -> usize {
        self.deltas.unwrap_or(match self.kind {
            FeatureKind::Mfcc => 2,
            FeatureKind::LogMel => 0,
        })
    }

    /// Dimensions of the static block: cepstra for MFCC, mel filters for log-mel.
    pub fn static_dims(&self) -> usize {
        match self.kind {
            FeatureKind::Mfcc => self.cepstra,
            FeatureKind::LogMel => self.mel_filters,
        }
    }

    /// Dimensions of a feature vector: the static block, then one block per delta order.
    pub fn dims(&self) -> usize {
        self.static_dims() * (1 + self.delta_order())
    }

    /// Seconds between two frames (10 ms by default).
    pub fn hop_seconds(&self) -> f64 {
        self.hop_samples as f64 / f64::from(self.sample_rate)
    }

    /// Number of frames a signal of `samples` samples yields: 1 + ⌊(N − L)/S⌋, or 0 when N < L
    /// (no padding, as `docs/features.md` specifies).
    pub fn frame_count(&self, samples: usize) -> usize {
        if samples < self.window_samples || self.hop_samples == 0 {
            0
        } else {
            1 + (samples - self.window_samples) / self.hop_samples
        }
    }

    /// Checks every setting; the extractor relies on a validated config.
    pub fn validate(&self) -> Result<(), FeatureError> {
        fn invalid(
            setting: &'static str,
            expected: impl Into<String>,
            found: impl ToString,
        ) -> FeatureError {
            FeatureError::InvalidConfig {
                setting,
                expected: expected.into(),
                found: found.to_string(),
            }
        }
        if !SAMPLE_RATE_RANGE.contains(&self.sample_rate) {
            return Err(invalid(
                "sample_rate",
                format!(
                    "from {} to {} Hz",
                    SAMPLE_RATE_RANGE.start(),
                    SAMPLE_RATE_RANGE.end()
                ),
                self.sample_rate,
            ));
        }
        if !(0.0..1.0).contains(&self.emphasis) {
            return Err(invalid("emphasis", "in [0, 1)", self.emphasis));
        }
        if !(1..=MAX_FFT_SIZE).contains(&self.window_samples) {
            return Err(invalid(
                "window_samples",
                format!("from 1 to {MAX_FFT_SIZE} samples"),
                self.window_samples,
            ));
        }
        if !(1..=MAX_HOP_SAMPLES).contains(&self.hop_samples) {
            return Err(invalid(
                "hop_samples",
                format!("from 1 to {MAX_HOP_SAMPLES} samples"),
                self.hop_samples,
            ));
        }
        if self.fft_size < self.window_samples.max(2)
            || !self.fft_size.is_multiple_of(2)
            || self.fft_size > MAX_FFT_SIZE
        {
            return Err(invalid(
                "fft_size",
                format!(
                    "even, at least window_samples ({}) and at most {MAX_FFT_SIZE}",
                    self.window_samples.max(2)
                ),
                self.fft_size,
            ));
        }
        if !(1..=MAX_MEL_FILTERS).contains(&self.mel_filters) {
            return Err(invalid(
                "mel_filters",
                format!("from 1 to {MAX_MEL_FILTERS}"),
                self.mel_filters,
            ));
        }
        let nyquist = f64::from(self.sample_rate) / 2.0;
        if !(self.band_low_hz >= 0.0 && self.band_low_hz < self.band_high_hz) {
            return Err(invalid(
                "band_low_hz",
                format!("at least 0 and below band_high_hz ({})", self.band_high_hz),
                self.band_low_hz,
            ));
        }
        if self.band_high_hz > nyquist {
            return Err(invalid(
                "band_high_hz",
                format!("at most half the sample rate ({nyquist})"),
                self.band_high_hz,
            ));
        }
        if !(self.log_floor > 0.0 && self.log_floor.is_finite()) {
            return Err(invalid(
                "log_floor",
                "a positive finite number",
                self.log_floor,
            ));
        }
        if self.kind == FeatureKind::Mfcc && !(1..=self.mel_filters).contains(&self.cepstra) {
            return Err(invalid(
                "cepstra",
                format!("between 1 and mel_filters ({})", self.mel_filters),
                self.cepstra,
            ));
        }
        let order = self.delta_order();
        if order > 2 {
            return Err(invalid("deltas", "0, 1 or 2", order));
        }
        if order > 0 && !(1..=MAX_SLOPE_REACH).contains(&self.slope_reach) {
            return Err(invalid(
                "slope_reach",
                format!("from 1 to {MAX_SLOPE_REACH} frames"),
                self.slope_reach,
            ));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_is_the_documented_front_end_with_39_dims() {
        let config = FeatureConfig::default();
        config.validate().unwrap();
        // docs/features.md "The default front end": MFCC c0…c12 + Δ + ΔΔ = 39 dims, 10 ms hop.
        assert_eq!(config.dims(), 39);
        assert_eq!(config.hop_seconds(), 0.01);
        assert_eq!(FeatureConfig::logmel().dims(), 40);
    }

    #[test]
    fn logmel_takes_deltas_only_when_asked() {
        let with_deltas = FeatureConfig {
            deltas: Some(2),
            ..FeatureConfig::logmel()
        };
        assert_eq!(with_deltas.dims(), 120);
    }

    #[test]
    fn frame_count_follows_the_documented_formula() {
        let config = FeatureConfig::default();
        // docs/features.md: frames = 1 + ⌊(N − 400)/160⌋, no padding; fewer than 400 samples give none.
        for (samples, frames) in [(0, 0), (399, 0), (400, 1), (559, 1), (560, 2), (16_000, 98)] {
            assert_eq!(config.frame_count(samples), frames, "{samples} samples");
        }
    }

    #[test]
    fn shipped_configs_spell_out_the_defaults() {
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../configs");
        let mfcc = FeatureConfig::from_toml_file(&root.join("features-mfcc.toml")).unwrap();
        assert_eq!(
            mfcc,
            FeatureConfig {
                deltas: Some(2),
                ..FeatureConfig::default()
            }
        );
        let logmel = FeatureConfig::from_toml_file(&root.join("features-logmel.toml")).unwrap();
        assert_eq!(
            logmel,
            FeatureConfig {
                deltas: Some(0),
                ..FeatureConfig::logmel()
            }
        );
    }

    #[test]
    fn toml_round_trips_and_missing_keys_take_defaults() {
        let config =
            FeatureConfig::from_toml_str("kind = \"logmel\"\n", Path::new("x.toml")).unwrap();
        assert_eq!(config, FeatureConfig::logmel());
        let text = FeatureConfig::default().to_toml_string();
        let back = FeatureConfig::from_toml_str(&text, Path::new("x.toml")).unwrap();
        assert_eq!(back.dims(), 39);
        assert_eq!(back.deltas, Some(2));
    }

    #[test]
    fn bad_configs_name_the_setting_file_and_line() {
        let error = FeatureConfig::from_toml_str(
            "mel_filters = 40\nfft_sise = 512\n",
            Path::new("my.toml"),
        )
        .unwrap_err()
        .to_string();
        assert!(
            error.contains("my.toml") && error.contains("line 2") && error.contains("fft_sise"),
            "{error}"
        );
        let error = FeatureConfig::from_toml_str("band_high_hz = 9000.0", Path::new("my.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("my.toml")
                && error.contains("band_high_hz")
                && error.contains("8000")
                && error.contains("9000"),
            "{error}"
        );
        let error = FeatureConfig::from_toml_str("cepstra = 41", Path::new("my.toml"))
            .unwrap_err()
            .to_string();
        assert!(error.contains("cepstra") && error.contains("41"), "{error}");
        for bad in [
            "fft_size = 256",
            "fft_size = 513",
            "hop_samples = 0",
            "deltas = 3",
            "log_floor = 0.0",
            "emphasis = 1.5",
            "band_low_hz = 8000.0",
        ] {
            assert!(
                FeatureConfig::from_toml_str(bad, Path::new("my.toml")).is_err(),
                "{bad}"
            );
        }
    }

    #[test]
    fn sizes_beyond_their_limits_are_errors_before_anything_is_built() {
        // Issue 16: `fft_size = 4000000000000` aborted when the extractor was built.
        for (bad, key, limit) in [
            ("fft_size = 4000000000000", "fft_size", "at most 65536"),
            (
                "window_samples = 70000\nfft_size = 70000",
                "window_samples",
                "to 65536",
            ),
            ("hop_samples = 99999999", "hop_samples", "to 65536"),
            ("mel_filters = 100000", "mel_filters", "to 1024"),
            ("slope_reach = 5000", "slope_reach", "to 100"),
            ("sample_rate = 1", "sample_rate", "from 1000 to 384000 Hz"),
        ] {
            let message = FeatureConfig::from_toml_str(bad, Path::new("huge.toml"))
                .unwrap_err()
                .to_string();
            assert!(
                message.contains("huge.toml") && message.contains(key) && message.contains(limit),
                "{bad}: {message}"
            );
        }
        let largest = FeatureConfig {
            window_samples: MAX_FFT_SIZE,
            fft_size: MAX_FFT_SIZE,
            ..FeatureConfig::default()
        };
        crate::FeatureExtractor::new(&largest).unwrap();
    }

    #[test]
    fn old_spellings_are_read_and_named_as_deprecated() {
        let old = "kind = \"fbank\"\npreemphasis = 0.9\nframe_length = 320\nframe_shift = 80\n\
                   mel_bins = 24\nlow_hz = 50.0\nhigh_hz = 7000.0\ndelta_window = 3\n\
                   normalize_variance = false\n";
        let config = FeatureConfig::from_toml_str(old, Path::new("old.toml")).unwrap();
        let new = "kind = \"logmel\"\nemphasis = 0.9\nwindow_samples = 320\nhop_samples = 80\n\
                   mel_filters = 24\nband_low_hz = 50.0\nband_high_hz = 7000.0\nslope_reach = 3\n\
                   unit_variance = false\n";
        assert_eq!(
            config,
            FeatureConfig::from_toml_str(new, Path::new("new.toml")).unwrap()
        );
        let notices = deprecated_spellings(&old.parse().unwrap());
        assert_eq!(notices.len(), 9, "{notices:?}");
        assert!(notices[0].contains("`preemphasis`") && notices[0].contains("`emphasis`"));
        assert!(notices[8].contains("logmel"));
        assert!(deprecated_spellings(&new.parse().unwrap()).is_empty());
    }
}

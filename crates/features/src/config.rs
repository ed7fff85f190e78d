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
    /// Log-mel filterbank energies: the same pipeline stopped before the DCT.
    Fbank,
}

/// Which mean and variance normalisation the pipeline applies after extraction.
///
/// [`crate::FeatureExtractor::extract`] itself never normalises, so that its output is exactly the
/// contract front end; consumers (the `features` command, training, decoding) apply this setting
/// with [`crate::Cmvn`] and [`crate::SpeakerCmvnStats`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum CmvnMode {
    /// No normalisation (the contract's default front end).
    #[default]
    None,
    /// Statistics from each utterance alone.
    Utterance,
    /// Statistics pooled over all utterances of a speaker.
    Speaker,
}

/// Settings of the acoustic front end. `Default` is the contract front end of DESIGN.md: 16 kHz,
/// pre-emphasis 0.97, 400-sample frames every 160 samples, symmetric Hamming window, 512-point FFT
/// power spectrum, 40 HTK-formula mel filters over 20–8000 Hz, natural log floored at 1e-10,
/// orthonormal DCT-II c0…c12, Δ and ΔΔ by regression over ±2 frames: 39 dimensions.
///
/// Missing TOML keys take these defaults; unknown keys are an error, so that a misspelt setting
/// is not silently ignored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct FeatureConfig {
    /// `"mfcc"` (default) or `"fbank"`.
    pub kind: FeatureKind,
    /// Sample rate the samples are at, in Hz (the audio stage delivers 16 000).
    pub sample_rate: u32,
    /// Pre-emphasis coefficient a: y[0] = x[0], y[n] = x[n] − a·x[n−1]; 0 turns it off.
    pub preemphasis: f64,
    /// Samples per analysis frame (400 = 25 ms at 16 kHz).
    pub frame_length: usize,
    /// Samples between frame starts (160 = 10 ms at 16 kHz).
    pub frame_shift: usize,
    /// FFT length; frames are zero-padded to it. Must be even and at least `frame_length`.
    pub fft_size: usize,
    /// Number of triangular mel filters.
    pub mel_bins: usize,
    /// Lower edge of the lowest mel filter, in Hz.
    pub low_hz: f64,
    /// Upper edge of the highest mel filter, in Hz (at most half the sample rate).
    pub high_hz: f64,
    /// Mel energies below this are raised to it before the natural log.
    pub log_floor: f64,
    /// Cepstral coefficients kept (c0…c(n−1)); used by `kind = "mfcc"` only.
    pub cepstra: usize,
    /// Δ features use a regression over ±`delta_window` frames.
    pub delta_window: usize,
    /// 0: static features only; 1: add Δ; 2: add Δ and ΔΔ. When absent: 2 for MFCC, 0 for fbank
    /// (fbank feeds models that see a wide context anyway, and 40 stays 40).
    pub deltas: Option<usize>,
    /// Normalisation applied after extraction (see [`CmvnMode`]).
    pub cmvn: CmvnMode,
    /// Whether CMVN also scales every dimension to unit variance (else it only removes the mean).
    pub normalize_variance: bool,
}

impl Default for FeatureConfig {
    fn default() -> Self {
        FeatureConfig {
            kind: FeatureKind::Mfcc,
            sample_rate: 16_000,
            preemphasis: 0.97,
            frame_length: 400,
            frame_shift: 160,
            fft_size: 512,
            mel_bins: 40,
            low_hz: 20.0,
            high_hz: 8000.0,
            log_floor: 1e-10,
            cepstra: 13,
            delta_window: 2,
            deltas: None,
            cmvn: CmvnMode::None,
            normalize_variance: true,
        }
    }
}

impl FeatureConfig {
    /// The contract front end with `kind = "fbank"`: 40 log-mel energies, no deltas.
    pub fn fbank() -> Self {
        FeatureConfig {
            kind: FeatureKind::Fbank,
            ..FeatureConfig::default()
        }
    }

    /// Parses and validates a TOML config.
    pub fn from_toml_str(text: &str, path: &Path) -> Result<Self, FeatureError> {
        let config: FeatureConfig =
            toml::from_str(text).map_err(|error| FeatureError::ConfigSyntax {
                path: path.to_path_buf(),
                message: error.to_string(),
            })?;
        config.validate()?;
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
            FeatureKind::Fbank => 0,
        })
    }

    /// Dimensions of the static block: cepstra for MFCC, mel bins for fbank.
    pub fn static_dims(&self) -> usize {
        match self.kind {
            FeatureKind::Mfcc => self.cepstra,
            FeatureKind::Fbank => self.mel_bins,
        }
    }

    /// Dimensions of a feature vector: the static block, then one block per delta order.
    pub fn dims(&self) -> usize {
        self.static_dims() * (1 + self.delta_order())
    }

    /// Frame shift in seconds (10 ms by default).
    pub fn frame_shift_seconds(&self) -> f64 {
        self.frame_shift as f64 / f64::from(self.sample_rate)
    }

    /// Number of frames a signal of `samples` samples yields: 1 + ⌊(N − L)/S⌋, or 0 when N < L
    /// (no padding, as the contract front end says).
    pub fn frame_count(&self, samples: usize) -> usize {
        if samples < self.frame_length || self.frame_shift == 0 {
            0
        } else {
            1 + (samples - self.frame_length) / self.frame_shift
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
        if self.sample_rate == 0 {
            return Err(invalid("sample_rate", "a positive number of Hz", 0));
        }
        if !(0.0..1.0).contains(&self.preemphasis) {
            return Err(invalid("preemphasis", "in [0, 1)", self.preemphasis));
        }
        if self.frame_length == 0 {
            return Err(invalid("frame_length", "at least 1 sample", 0));
        }
        if self.frame_shift == 0 {
            return Err(invalid("frame_shift", "at least 1 sample", 0));
        }
        if self.fft_size < self.frame_length.max(2) || self.fft_size % 2 != 0 {
            return Err(invalid(
                "fft_size",
                format!(
                    "even and at least frame_length ({})",
                    self.frame_length.max(2)
                ),
                self.fft_size,
            ));
        }
        if self.mel_bins == 0 {
            return Err(invalid("mel_bins", "at least 1", 0));
        }
        let nyquist = f64::from(self.sample_rate) / 2.0;
        if !(self.low_hz >= 0.0 && self.low_hz < self.high_hz) {
            return Err(invalid(
                "low_hz",
                format!("at least 0 and below high_hz ({})", self.high_hz),
                self.low_hz,
            ));
        }
        if self.high_hz > nyquist {
            return Err(invalid(
                "high_hz",
                format!("at most half the sample rate ({nyquist})"),
                self.high_hz,
            ));
        }
        if !(self.log_floor > 0.0 && self.log_floor.is_finite()) {
            return Err(invalid(
                "log_floor",
                "a positive finite number",
                self.log_floor,
            ));
        }
        if self.kind == FeatureKind::Mfcc && !(1..=self.mel_bins).contains(&self.cepstra) {
            return Err(invalid(
                "cepstra",
                format!("between 1 and mel_bins ({})", self.mel_bins),
                self.cepstra,
            ));
        }
        let order = self.delta_order();
        if order > 2 {
            return Err(invalid("deltas", "0, 1 or 2", order));
        }
        if order > 0 && self.delta_window == 0 {
            return Err(invalid("delta_window", "at least 1 frame", 0));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_is_the_contract_front_end_with_39_dims() {
        let config = FeatureConfig::default();
        config.validate().unwrap();
        // DESIGN.md "Default front end": MFCC c0…c12 + Δ + ΔΔ = 39 dims, 10 ms shift.
        assert_eq!(config.dims(), 39);
        assert_eq!(config.frame_shift_seconds(), 0.01);
        assert_eq!(FeatureConfig::fbank().dims(), 40);
    }

    #[test]
    fn fbank_takes_deltas_only_when_asked() {
        let with_deltas = FeatureConfig {
            deltas: Some(2),
            ..FeatureConfig::fbank()
        };
        assert_eq!(with_deltas.dims(), 120);
    }

    #[test]
    fn frame_count_follows_the_contract_formula() {
        let config = FeatureConfig::default();
        // DESIGN.md: frames = 1 + ⌊(N − 400)/160⌋, no padding; fewer than 400 samples give none.
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
        let fbank = FeatureConfig::from_toml_file(&root.join("features-fbank.toml")).unwrap();
        assert_eq!(
            fbank,
            FeatureConfig {
                deltas: Some(0),
                ..FeatureConfig::fbank()
            }
        );
    }

    #[test]
    fn toml_round_trips_and_missing_keys_take_defaults() {
        let config =
            FeatureConfig::from_toml_str("kind = \"fbank\"\n", Path::new("x.toml")).unwrap();
        assert_eq!(config, FeatureConfig::fbank());
        let text = FeatureConfig::default().to_toml_string();
        let back = FeatureConfig::from_toml_str(&text, Path::new("x.toml")).unwrap();
        assert_eq!(back.dims(), 39);
        assert_eq!(back.deltas, Some(2));
    }

    #[test]
    fn bad_configs_name_the_setting_file_and_line() {
        let error =
            FeatureConfig::from_toml_str("mel_bins = 40\nfft_sise = 512\n", Path::new("my.toml"))
                .unwrap_err()
                .to_string();
        assert!(
            error.contains("my.toml") && error.contains("line 2") && error.contains("fft_sise"),
            "{error}"
        );
        let error = FeatureConfig::from_toml_str("high_hz = 9000.0", Path::new("my.toml"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("high_hz") && error.contains("8000") && error.contains("9000"),
            "{error}"
        );
        let error = FeatureConfig::from_toml_str("cepstra = 41", Path::new("my.toml"))
            .unwrap_err()
            .to_string();
        assert!(error.contains("cepstra") && error.contains("41"), "{error}");
        for bad in [
            "fft_size = 256",
            "fft_size = 513",
            "frame_shift = 0",
            "deltas = 3",
            "log_floor = 0.0",
            "preemphasis = 1.5",
            "low_hz = 8000.0",
        ] {
            assert!(
                FeatureConfig::from_toml_str(bad, Path::new("my.toml")).is_err(),
                "{bad}"
            );
        }
    }
}

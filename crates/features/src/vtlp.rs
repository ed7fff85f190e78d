//! Vocal-tract length perturbation (VTLP): the mel filter bank read through a warped frequency
//! axis, so that one voice sounds like a speaker with a shorter or longer vocal tract.
//!
//! The warp is the piecewise-linear one of Jaitly & Hinton (2013), "Vocal Tract Length
//! Perturbation (VTLP) improves speech recognition", eq. 1, with warp factor α, upper boundary
//! frequency F_hi and Nyquist frequency S/2:
//!
//! ```text
//! W(f) = α·f                                                    for f ≤ F_b
//! W(f) = S/2 − (S/2 − F_hi·min(α, 1)) / (S/2 − F_b) · (S/2 − f)   for f > F_b
//! with the breakpoint F_b = F_hi·min(α, 1)/α
//! ```
//!
//! so W is continuous at F_b (both pieces give F_hi·min(α, 1)), maps 0 to 0 and S/2 to S/2, and
//! is the identity for α = 1. The paper used F_hi = 4800 Hz at 16 kHz and drew α uniformly from
//! 0.9–1.1 per utterance (both from memory of the paper), which are the defaults here.
//!
//! Filter i of the warped bank weighs FFT bin k by T_i(W(f_k)), where T_i is the unwarped
//! triangle: energy at frequency f is counted where W puts it, so α > 1 moves a tone's energy
//! into higher filters (a shorter vocal tract, higher formants) and α < 1 into lower ones.

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::{FeatureConfig, FeatureError};

/// The piecewise-linear VTLP frequency warp of one factor (see the module overview).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VtlpWarp {
    factor: f64,
    boundary_hz: f64,
    nyquist_hz: f64,
}

impl VtlpWarp {
    /// The warp with factor α = `factor` (> 0) and upper boundary `boundary_hz` (strictly
    /// between 0 and half the sample rate).
    pub fn new(factor: f64, boundary_hz: f64, sample_rate: u32) -> Result<VtlpWarp, FeatureError> {
        let nyquist_hz = f64::from(sample_rate) / 2.0;
        if !(factor > 0.0 && factor.is_finite()) {
            return Err(FeatureError::InvalidSetting {
                key: "augmentation.vtlp.warp_factor",
                expected: "a warp factor above 0".into(),
                found: factor.to_string(),
            });
        }
        if !(boundary_hz > 0.0 && boundary_hz < nyquist_hz) {
            return Err(FeatureError::InvalidSetting {
                key: "augmentation.vtlp.boundary_hz",
                expected: format!("a frequency above 0 and below {nyquist_hz} Hz"),
                found: boundary_hz.to_string(),
            });
        }
        Ok(VtlpWarp {
            factor,
            boundary_hz,
            nyquist_hz,
        })
    }

    /// The warp factor α.
    pub fn factor(&self) -> f64 {
        self.factor
    }

    /// The breakpoint F_b = F_hi·min(α, 1)/α where the two linear pieces meet.
    pub fn breakpoint_hz(&self) -> f64 {
        self.boundary_hz * self.factor.min(1.0) / self.factor
    }

    /// W(f), for f in [0, S/2].
    pub fn apply(&self, hz: f64) -> f64 {
        let breakpoint = self.breakpoint_hz();
        if hz <= breakpoint {
            self.factor * hz
        } else {
            let top = self.nyquist_hz;
            let slope = (top - self.boundary_hz * self.factor.min(1.0)) / (top - breakpoint);
            top - slope * (top - hz)
        }
    }
}

/// `[augmentation.vtlp]`: how often and how strongly to warp.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct VtlpConfig {
    /// Chance that an utterance is warped.
    pub probability: f64,
    /// Range of α, [low, high], drawn uniformly; 0 < low ≤ high.
    pub warp_factor: [f64; 2],
    /// The upper boundary frequency F_hi (Hz).
    pub boundary_hz: f64,
}

impl Default for VtlpConfig {
    /// Every utterance, α uniform in 0.9–1.1, F_hi = 4800 Hz (the paper's settings, from memory).
    fn default() -> Self {
        VtlpConfig {
            probability: 1.0,
            warp_factor: [0.9, 1.1],
            boundary_hz: 4800.0,
        }
    }
}

impl VtlpConfig {
    /// Checks the settings against the front end they will warp: the probability, the factor
    /// range, the boundary, and that at both ends of the factor range every mel filter still
    /// covers an FFT bin (the filters narrow most at the extremes).
    pub fn validate(&self, features: &FeatureConfig) -> Result<(), FeatureError> {
        if !(0.0..=1.0).contains(&self.probability) {
            return Err(FeatureError::InvalidSetting {
                key: "augmentation.vtlp.probability",
                expected: "a probability from 0 to 1".into(),
                found: self.probability.to_string(),
            });
        }
        let [low, high] = self.warp_factor;
        if !(low > 0.0 && low <= high && high.is_finite()) {
            return Err(FeatureError::InvalidSetting {
                key: "augmentation.vtlp.warp_factor",
                expected: "[low, high] with 0 < low ≤ high".into(),
                found: format!("{:?}", self.warp_factor),
            });
        }
        for factor in [low, high] {
            let warp = VtlpWarp::new(factor, self.boundary_hz, features.sample_rate)?;
            crate::mel::MelFilterbank::warped(
                features.sample_rate,
                features.fft_size,
                features.mel_filters,
                features.band_low_hz,
                features.band_high_hz,
                &warp,
            )?;
        }
        Ok(())
    }

    /// Draws whether to warp (one uniform value) and, if so, α uniformly in the range (a
    /// second). `None`: leave this utterance unwarped.
    pub fn draw<R: Rng + ?Sized>(&self, rng: &mut R) -> Option<f64> {
        if rng.random::<f64>() >= self.probability {
            return None;
        }
        let [low, high] = self.warp_factor;
        Some(if high > low {
            rng.random_range(low..=high)
        } else {
            low
        })
    }

    /// The warp for factor `factor` with this configuration's boundary.
    pub fn warp(&self, factor: f64, sample_rate: u32) -> Result<VtlpWarp, FeatureError> {
        VtlpWarp::new(factor, self.boundary_hz, sample_rate)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mel::MelFilterbank;
    use crate::FeatureExtractor;
    use rand::SeedableRng;

    #[test]
    fn worked_warp_values_from_the_formula() {
        // α = 1.1, F_hi = 4800, S/2 = 8000: F_b = 4800/1.1 = 4363.64 Hz; below it W(f) = 1.1·f;
        // above, the slope is (8000 − 4800)/(8000 − 4363.64) = 3200/3636.36 = 0.88, so
        // W(6000) = 8000 − 0.88·2000 = 6240 (Jaitly & Hinton 2013 eq. 1, worked by hand).
        let up = VtlpWarp::new(1.1, 4800.0, 16_000).unwrap();
        assert!((up.breakpoint_hz() - 4_363.636_363_636_364).abs() < 1e-9);
        assert!((up.apply(1000.0) - 1100.0).abs() < 1e-9);
        assert!((up.apply(6000.0) - 6240.0).abs() < 1e-9);
        // α = 0.9: F_b = 4800, W(4800) = 4320, slope (8000 − 4320)/(8000 − 4800) = 1.15,
        // W(6000) = 8000 − 1.15·2000 = 5700 (by hand, same formula).
        let down = VtlpWarp::new(0.9, 4800.0, 16_000).unwrap();
        assert_eq!(down.breakpoint_hz(), 4800.0);
        assert!((down.apply(1000.0) - 900.0).abs() < 1e-9);
        assert!((down.apply(6000.0) - 5700.0).abs() < 1e-9);
        for warp in [up, down] {
            assert_eq!(warp.apply(0.0), 0.0);
            assert!((warp.apply(8000.0) - 8000.0).abs() < 1e-9);
            // Continuous at the breakpoint.
            let b = warp.breakpoint_hz();
            assert!((warp.apply(b + 1e-6) - warp.apply(b)).abs() < 1e-5);
        }
    }

    #[test]
    fn factor_one_gives_exactly_the_unwarped_filters_and_features() {
        let config = FeatureConfig::default();
        let identity = VtlpWarp::new(1.0, 4800.0, 16_000).unwrap();
        for k in 0..=256 {
            let hz = k as f64 * 31.25;
            assert_eq!(identity.apply(hz), hz);
        }
        let plain = MelFilterbank::new(16_000, 512, 40, 20.0, 8000.0).unwrap();
        let warped = MelFilterbank::warped(16_000, 512, 40, 20.0, 8000.0, &identity).unwrap();
        assert_eq!(plain.dense_weights(), warped.dense_weights());
        let extractor = FeatureExtractor::new(&config).unwrap();
        let samples: Vec<f32> = (0..8_000)
            .map(|n| 0.3 * ((n as f32) * 0.013).sin() * ((n as f32) * 0.21).cos())
            .collect();
        assert_eq!(
            extractor.extract_warped(&samples, &identity).unwrap(),
            extractor.extract(&samples)
        );
    }

    #[test]
    fn a_warp_moves_a_tones_peak_filter_the_expected_way() {
        let extractor = FeatureExtractor::new(&FeatureConfig::logmel()).unwrap();
        let centres = extractor.mel_filterbank().centers_hz().to_vec();
        let mel = |hz: f64| crate::mel::hz_to_mel(hz);
        for band in [12usize, 20, 26] {
            let hz = centres[band];
            let tone: Vec<f32> = (0..8_000)
                .map(|n| 0.5 * (2.0 * std::f64::consts::PI * hz * n as f64 / 16_000.0).sin() as f32)
                .collect();
            for factor in [0.9, 1.1] {
                let warp = VtlpWarp::new(factor, 4800.0, 16_000).unwrap();
                let features = extractor.extract_warped(&tone, &warp).unwrap();
                let row = features.row(features.nrows() / 2);
                let loudest = (0..row.len())
                    .max_by(|&a, &b| row[a].total_cmp(&row[b]))
                    .unwrap();
                // The tone's energy is counted at W(f): the loudest filter is the one whose
                // centre is nearest W(f) on the mel scale, above the original for α > 1 and
                // below it for α < 1.
                let target = mel(warp.apply(hz));
                let expected = (0..centres.len())
                    .min_by(|&a, &b| {
                        (mel(centres[a]) - target)
                            .abs()
                            .total_cmp(&(mel(centres[b]) - target).abs())
                    })
                    .unwrap();
                assert_eq!(loudest, expected, "{hz:.0} Hz, α = {factor}");
                if factor > 1.0 {
                    assert!(loudest > band, "{hz:.0} Hz, α = {factor}: {loudest}");
                } else {
                    assert!(loudest < band, "{hz:.0} Hz, α = {factor}: {loudest}");
                }
            }
        }
    }

    #[test]
    fn bad_settings_name_their_key() {
        let features = FeatureConfig::default();
        for (config, key) in [
            (
                VtlpConfig {
                    warp_factor: [0.0, 1.1],
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.warp_factor",
            ),
            (
                VtlpConfig {
                    warp_factor: [-0.9, 1.1],
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.warp_factor",
            ),
            (
                VtlpConfig {
                    warp_factor: [1.1, 0.9],
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.warp_factor",
            ),
            (
                VtlpConfig {
                    probability: 1.5,
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.probability",
            ),
            (
                VtlpConfig {
                    boundary_hz: 9000.0,
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.boundary_hz",
            ),
            (
                // So strong a warp squeezes the lowest filters between two FFT bins.
                VtlpConfig {
                    warp_factor: [0.9, 4.0],
                    ..VtlpConfig::default()
                },
                "augmentation.vtlp.warp_factor",
            ),
        ] {
            let message = config.validate(&features).unwrap_err().to_string();
            assert!(message.starts_with(key), "{config:?}: {message}");
            assert!(
                message.contains("expected") && message.contains("found"),
                "{message}"
            );
        }
        VtlpConfig::default().validate(&features).unwrap();
        let error = toml::from_str::<VtlpConfig>("warp = [0.9, 1.1]").unwrap_err();
        assert!(error.to_string().contains("unknown field"), "{error}");
    }

    #[test]
    fn draws_stay_in_range_and_probability_zero_never_warps() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        let config = VtlpConfig::default();
        for _ in 0..100 {
            let factor = config.draw(&mut rng).unwrap();
            assert!((0.9..=1.1).contains(&factor));
        }
        let never = VtlpConfig {
            probability: 0.0,
            ..VtlpConfig::default()
        };
        assert!((0..100).all(|_| never.draw(&mut rng).is_none()));
    }
}

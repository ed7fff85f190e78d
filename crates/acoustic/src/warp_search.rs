//! Test-time warp search: the front end run at a few vocal-tract warp factors, the network's
//! log-posteriors computed for each, and those of the most confident factor kept.
//!
//! A network trained with vocal-tract length perturbation (`[augmentation.vtlp]`) has seen
//! every warp factor of its training range, so at test time a voice unlike the training voices
//! can be read through the warp under which the network is surest of itself. Confidence is
//! the mean over output frames of the largest log-posterior of the frame (blank included):
//! 0 when every frame is certain, more negative the more the network hesitates. This is the
//! classic idea of choosing the warp per utterance that maximises the model's score (common
//! practice in speaker normalisation; here with the network's own posteriors as the score).
//! Each segment is searched on its own, so `transcribe` needs no speaker labels.
//!
//! The search is written in `model.toml` as `[inference] warp_factors`
//! (docs/model-directory.md): `isogloss train` writes the two ends of its VTLP range and 1.0;
//! a model without the table decodes with the unwarped front end alone, as before.
//! Measured in DEVELOPERS.md ("Test-time warp search").

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use isogloss_features::{FeatureConfig, VtlpConfig, VtlpWarp};

use crate::AcousticError;

/// The upper boundary frequency of the warp when `model.toml` does not name one: that of the
/// training default ([`VtlpConfig::default`]).
fn default_boundary_hz() -> f64 {
    VtlpConfig::default().boundary_hz
}

/// The factors a search may try (docs/limits.md); training draws from about 0.9–1.1.
pub const FACTOR_LIMITS: [f64; 2] = [0.5, 2.0];

/// `[inference]` of `model.toml`: how the model is best decoded.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Inference {
    /// Vocal-tract warp factors tried per segment (each > 0; 1.0 is the unwarped front end).
    /// The most confident wins; on a tie the first listed.
    pub warp_factors: Vec<f64>,
    /// Upper boundary frequency F_hi of the piecewise-linear warp, Hz.
    #[serde(default = "default_boundary_hz")]
    pub warp_boundary_hz: f64,
}

impl Inference {
    /// The search over the ends of a training warp range and 1.0, in the order
    /// [1.0, low, high] (1.0 first, so that it wins ties); `None` when the training did not
    /// warp (probability 0) or its range is the single factor 1.0.
    pub fn from_training(vtlp: &VtlpConfig) -> Option<Inference> {
        let [low, high] = vtlp.warp_factor;
        if vtlp.probability <= 0.0 || (low == 1.0 && high == 1.0) {
            return None;
        }
        let mut factors = vec![1.0];
        for f in [low, high] {
            if !factors.contains(&f) {
                factors.push(f);
            }
        }
        Some(Inference {
            warp_factors: factors,
            warp_boundary_hz: vtlp.boundary_hz,
        })
    }

    /// Checks the factors against the front end: at least one, each within [`FACTOR_LIMITS`],
    /// none repeated, and every mel filter still covering an FFT bin at the extremes (the check of
    /// [`VtlpConfig::validate`]).
    pub fn validate(&self, features: &FeatureConfig) -> Result<(), AcousticError> {
        let bad = |problem: String| AcousticError::Config(format!("warp_factors: {problem}"));
        if self.warp_factors.is_empty() {
            return Err(bad("no factor given (write [1.0] for no search)".into()));
        }
        for (i, &f) in self.warp_factors.iter().enumerate() {
            if !(f.is_finite() && f > 0.0) {
                return Err(bad(format!("{f} is not a positive number")));
            }
            if !(FACTOR_LIMITS[0]..=FACTOR_LIMITS[1]).contains(&f) {
                return Err(bad(format!(
                    "{f} is outside {} to {} (a warp that strong reads speech as another kind of sound)",
                    FACTOR_LIMITS[0], FACTOR_LIMITS[1]
                )));
            }
            if self.warp_factors[..i].contains(&f) {
                return Err(bad(format!("{f} is listed twice")));
            }
        }
        let low = self
            .warp_factors
            .iter()
            .cloned()
            .fold(f64::INFINITY, f64::min);
        let high = self.warp_factors.iter().cloned().fold(0.0, f64::max);
        VtlpConfig {
            probability: 1.0,
            warp_factor: [low, high],
            boundary_hz: self.warp_boundary_hz,
        }
        .validate(features)
        .map_err(|e| bad(e.to_string()))
    }

    /// One warp per factor, `None` for 1.0 (the unwarped front end, bit for bit).
    pub fn warps(&self, sample_rate: u32) -> Result<Vec<Option<VtlpWarp>>, AcousticError> {
        self.warp_factors
            .iter()
            .map(|&f| {
                if f == 1.0 {
                    Ok(None)
                } else {
                    VtlpWarp::new(f, self.warp_boundary_hz, sample_rate)
                        .map(Some)
                        .map_err(|e| AcousticError::Config(format!("warp_factors: {e}")))
                }
            })
            .collect()
    }
}

/// Mean over frames of each frame's largest log-posterior (≤ 0; 0 for no frames).
pub fn confidence(log_posteriors: &Array2<f32>) -> f64 {
    let frames = log_posteriors.nrows();
    if frames == 0 {
        return 0.0;
    }
    let total: f64 = log_posteriors
        .rows()
        .into_iter()
        .map(|row| row.iter().cloned().fold(f32::NEG_INFINITY, f32::max) as f64)
        .sum();
    total / frames as f64
}

/// The index of the most confident of `candidates` ([`confidence`]); the first on a tie.
/// `None` for an empty list.
pub fn most_confident(candidates: &[Array2<f32>]) -> Option<usize> {
    let mut best: Option<(usize, f64)> = None;
    for (i, candidate) in candidates.iter().enumerate() {
        let c = confidence(candidate);
        if best.is_none_or(|(_, b)| c > b) {
            best = Some((i, c));
        }
    }
    best.map(|(i, _)| i)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn confidence_is_the_mean_of_each_frames_best_log_posterior() {
        // Worked by hand: frame maxima ln 0.5 and ln 0.9.
        let p = array![
            [0.5f32.ln(), 0.3f32.ln(), 0.2f32.ln()],
            [0.05f32.ln(), 0.9f32.ln(), 0.05f32.ln()]
        ];
        let expected = (0.5f64.ln() + 0.9f64.ln()) / 2.0;
        assert!((confidence(&p) - expected).abs() < 1e-6);
        assert_eq!(confidence(&Array2::zeros((0, 3))), 0.0);
    }

    #[test]
    fn the_surest_candidate_wins_and_the_first_on_a_tie() {
        let unsure = array![[0.5f32.ln(), 0.5f32.ln()]];
        let sure = array![[0.9f32.ln(), 0.1f32.ln()]];
        assert_eq!(
            most_confident(&[unsure.clone(), sure.clone(), unsure.clone()]),
            Some(1)
        );
        assert_eq!(most_confident(&[sure.clone(), sure]), Some(0));
        assert_eq!(most_confident(&[]), None);
    }

    #[test]
    fn training_ranges_give_one_and_their_ends() {
        let vtlp = VtlpConfig::default();
        let search = Inference::from_training(&vtlp).unwrap();
        assert_eq!(
            search.warp_factors,
            vec![1.0, vtlp.warp_factor[0], vtlp.warp_factor[1]]
        );
        assert_eq!(search.warp_boundary_hz, vtlp.boundary_hz);
        let never = VtlpConfig {
            probability: 0.0,
            ..VtlpConfig::default()
        };
        assert_eq!(Inference::from_training(&never), None);
        let one_sided = VtlpConfig {
            warp_factor: [1.0, 1.1],
            ..VtlpConfig::default()
        };
        assert_eq!(
            Inference::from_training(&one_sided).unwrap().warp_factors,
            vec![1.0, 1.1]
        );
    }

    #[test]
    fn bad_factors_are_rejected_with_the_key_named() {
        let features = FeatureConfig::default();
        let with = |factors: Vec<f64>| Inference {
            warp_factors: factors,
            warp_boundary_hz: 4800.0,
        };
        assert!(with(vec![1.0, 0.9, 1.1]).validate(&features).is_ok());
        for (factors, says) in [
            (vec![], "no factor"),
            (vec![1.0, 0.0], "not a positive number"),
            (vec![1.0, f64::NAN], "not a positive number"),
            (vec![1.0, 1.0], "listed twice"),
        ] {
            let message = with(factors).validate(&features).unwrap_err().to_string();
            assert!(
                message.contains("warp_factors") && message.contains(says),
                "{message}"
            );
        }
        // Beyond the limits, and within them a warp so strong that a mel filter covers no FFT
        // bin (found by trying: 2.0 still leaves every filter a bin at 40 filters and 512
        // points, so a finer bank is used).
        for (factors, says) in [(vec![1.0, 0.3], "outside 0.5 to 2"), (vec![2.5], "outside")] {
            let message = with(factors).validate(&features).unwrap_err().to_string();
            assert!(message.contains(says), "{message}");
        }
        let fine = FeatureConfig {
            mel_filters: 80,
            fft_size: 256,
            window_samples: 256,
            ..FeatureConfig::default()
        };
        let message = with(vec![1.0, 2.0])
            .validate(&fine)
            .unwrap_err()
            .to_string();
        assert!(message.contains("FFT bin"), "{message}");
    }

    #[test]
    fn factor_one_is_the_unwarped_front_end() {
        let search = Inference {
            warp_factors: vec![1.0, 0.9],
            warp_boundary_hz: 4800.0,
        };
        let warps = search.warps(16000).unwrap();
        assert!(warps[0].is_none());
        assert_eq!(warps[1].as_ref().unwrap().factor(), 0.9);
    }
}

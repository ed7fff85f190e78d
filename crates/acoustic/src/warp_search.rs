//! Test-time warp search: the front end run at a few vocal-tract warp factors, the network's
//! log-posteriors computed for each, and one of them kept per segment.
//!
//! A network trained with vocal-tract length perturbation (`[augmentation.vtlp]`) has seen
//! every warp factor of its training range, so at test time a voice unlike the training voices
//! can be read through the warp that suits it best. Which one is decided per segment, so
//! `transcribe` needs no speaker labels, in one of two ways ([`Choice`]):
//!
//! - by the decoder (the default): every candidate's posteriors are decoded, and the candidate
//!   whose best hypothesis has the highest acoustic score, ln P(units | posteriors), is kept —
//!   the warp under which the recognised words are most likely, the classic maximum-likelihood
//!   choice of a warp factor (common practice in speaker normalisation), with the decoder's own
//!   hypothesis as the transcription. It costs one beam search per candidate;
//! - by the posteriors alone: the most confident candidate, confidence being the mean over
//!   output frames of the frame's largest log-posterior (blank included; 0 when every frame
//!   is certain). Greedy decoding always chooses this way.
//!
//! The search is written in `model.toml` as `[inference]` (docs/model-directory.md):
//! `isogloss train` writes the two ends of its VTLP range and 1.0; a model without the table
//! decodes with the unwarped front end alone, as before. Measured in DEVELOPERS.md ("Test-time
//! warp search").

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use isogloss_features::{FeatureConfig, VtlpConfig, VtlpWarp};

use crate::config::MatmulPrecision;
use crate::AcousticError;

/// The upper boundary frequency of the warp when `model.toml` does not name one: that of the
/// training default ([`VtlpConfig::default`]).
fn default_boundary_hz() -> f64 {
    VtlpConfig::default().boundary_hz
}

/// The factors a search may try (docs/limits.md); training draws from about 0.9–1.1.
pub const FACTOR_LIMITS: [f64; 2] = [0.5, 2.0];

/// The search of a table that names no warp factors: the unwarped front end alone.
fn plain_factors() -> Vec<f64> {
    vec![1.0]
}

fn is_f32(precision: &MatmulPrecision) -> bool {
    *precision == MatmulPrecision::F32
}

/// `[inference]` of `model.toml`: how the model is best decoded.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Inference {
    /// Vocal-tract warp factors tried per segment (each > 0; 1.0 is the unwarped front end).
    /// On a tie between candidates the first listed wins. Absent: `[1.0]`, no search.
    #[serde(default = "plain_factors")]
    pub warp_factors: Vec<f64>,
    /// Upper boundary frequency F_hi of the piecewise-linear warp, Hz.
    #[serde(default = "default_boundary_hz")]
    pub warp_boundary_hz: f64,
    /// Tempo factors tried as well, each unwarped: the segment resampled to play `factor`
    /// times as fast before the front end, as the training's `speed_factors` do (tempo and
    /// pitch together). Empty (the default, and what `isogloss train` writes): none. A tempo
    /// candidate's frames are `factor` times as far apart in the recording.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub speed_factors: Vec<f64>,
    /// How the candidate is chosen per segment ([`Choice`]); by default with the decoder.
    #[serde(default)]
    pub choose: Choice,
    /// Number format of the network's matrix products: f32 (the default), or operands rounded
    /// to bfloat16 with f32 sums on CPUs with AVX-512 BF16 (others run f32), about twice as
    /// fast. Bias, normalisation and the softmax stay f32.
    #[serde(default, skip_serializing_if = "is_f32")]
    pub matmul_precision: MatmulPrecision,
}

/// How the search chooses among its candidates.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Choice {
    /// Every candidate goes to the decoder and the one whose best hypothesis has the highest
    /// acoustic score (ln P(units | posteriors), summed over the hypothesis' alignments) is
    /// kept: the warp under which the recognised words are most likely. A greedy decoder has
    /// no hypotheses to compare and keeps the most confident candidate, as
    /// [`Choice::Posteriors`] does. Ties go to the more confident candidate.
    #[default]
    Hypothesis,
    /// The candidate whose posteriors are most confident ([`confidence`]) alone goes to the
    /// decoder: one beam search per segment instead of one per candidate.
    Posteriors,
}

/// One front end of the search: a tempo factor and a warp factor (1.0: unchanged).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Candidate {
    /// Tempo: the samples are played this many times as fast before the front end.
    pub speed: f64,
    /// Vocal-tract warp of the mel filter bank.
    pub warp: f64,
}

impl Candidate {
    /// The unchanged front end.
    pub const PLAIN: Candidate = Candidate {
        speed: 1.0,
        warp: 1.0,
    };
}

/// A candidate ready to compute features: the tempo and the warp built for the front end.
pub struct Frontend {
    /// What it is.
    pub candidate: Candidate,
    warp: Option<VtlpWarp>,
}

impl Frontend {
    /// Features of `samples` through this front end (before normalisation).
    pub fn features(
        &self,
        extractor: &isogloss_features::FeatureExtractor,
        samples: &[f32],
    ) -> Result<ndarray::Array2<f32>, isogloss_features::FeatureError> {
        let resampled;
        let samples = if self.candidate.speed == 1.0 {
            samples
        } else {
            resampled = isogloss_audio::speed_perturb(samples, self.candidate.speed);
            &resampled
        };
        match &self.warp {
            None => Ok(extractor.extract(samples)),
            Some(warp) => extractor.extract_warped(samples, warp),
        }
    }

    /// The unchanged front end alone (a model without a search).
    pub fn plain() -> Vec<Frontend> {
        vec![Frontend {
            candidate: Candidate::PLAIN,
            warp: None,
        }]
    }
}

impl Inference {
    /// The table `isogloss train` writes: the search over the ends of the training's warp
    /// range and 1.0, in the order [1.0, low, high] (1.0 first, so that it wins ties), and the
    /// number format of the training's products (a network trained with bf16 products is
    /// decoded with them). `None` when neither applies: the training did not warp (probability
    /// 0, or the single factor 1.0) and ran its products in f32.
    pub fn from_training(vtlp: &VtlpConfig, precision: MatmulPrecision) -> Option<Inference> {
        let [low, high] = vtlp.warp_factor;
        let mut factors = vec![1.0];
        if vtlp.probability > 0.0 {
            for f in [low, high] {
                if !factors.contains(&f) {
                    factors.push(f);
                }
            }
        }
        if factors.len() == 1 && precision == MatmulPrecision::F32 {
            return None;
        }
        Some(Inference {
            warp_factors: factors,
            warp_boundary_hz: vtlp.boundary_hz,
            speed_factors: Vec::new(),
            choose: Choice::default(),
            matmul_precision: precision,
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
        for (i, &f) in self.speed_factors.iter().enumerate() {
            isogloss_audio::check_speed_factor(f)
                .map_err(|e| AcousticError::Config(format!("speed_factors: {e}")))?;
            if self.speed_factors[..i].contains(&f) {
                return Err(AcousticError::Config(format!(
                    "speed_factors: {f} is listed twice"
                )));
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

    /// The candidates in the order tried: every warp factor at the normal tempo, then every
    /// tempo factor unwarped (one already listed is not repeated).
    pub fn candidates(&self) -> Vec<Candidate> {
        let mut out: Vec<Candidate> = self
            .warp_factors
            .iter()
            .map(|&warp| Candidate { speed: 1.0, warp })
            .collect();
        for &speed in &self.speed_factors {
            let candidate = Candidate { speed, warp: 1.0 };
            if !out.contains(&candidate) {
                out.push(candidate);
            }
        }
        out
    }

    /// The front end of each candidate; an unwarped one reads the plain mel filter bank, bit
    /// for bit.
    pub fn frontends(&self, sample_rate: u32) -> Result<Vec<Frontend>, AcousticError> {
        self.candidates()
            .into_iter()
            .map(|candidate| {
                let warp = if candidate.warp == 1.0 {
                    None
                } else {
                    Some(
                        VtlpWarp::new(candidate.warp, self.warp_boundary_hz, sample_rate)
                            .map_err(|e| AcousticError::Config(format!("warp_factors: {e}")))?,
                    )
                };
                Ok(Frontend { candidate, warp })
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

/// The index of the most confident of `candidates` ([`confidence`]) among those with frames;
/// the first on a tie (and when none has frames). `None` for an empty list.
pub fn most_confident(candidates: &[Array2<f32>]) -> Option<usize> {
    by_confidence(candidates.iter()).first().copied()
}

/// The indices of `candidates` from the most confident ([`confidence`]) to the least, those
/// without frames last (a tempo change can shorten a very short segment to nothing, which says
/// nothing about the segment); equals keep their order.
pub fn by_confidence<'a>(candidates: impl IntoIterator<Item = &'a Array2<f32>>) -> Vec<usize> {
    let scores: Vec<f64> = candidates
        .into_iter()
        .map(|candidate| {
            if candidate.nrows() == 0 {
                f64::NEG_INFINITY
            } else {
                confidence(candidate)
            }
        })
        .collect();
    let mut order: Vec<usize> = (0..scores.len()).collect();
    // A stable sort, descending; no score is NaN (posteriors are checked finite or -inf, and
    // a frame's largest is finite).
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    order
}

/// Keeps the candidates a search hands to the decoder: all of them, most confident first, for
/// [`Choice::Hypothesis`]; the most confident alone for [`Choice::Posteriors`]. Each
/// candidate travels with its own `T` (its front end, its frame shift).
pub fn arrange<T>(choose: Choice, candidates: Vec<(Array2<f32>, T)>) -> Vec<(Array2<f32>, T)> {
    let order = by_confidence(candidates.iter().map(|(m, _)| m));
    let mut slots: Vec<Option<(Array2<f32>, T)>> = candidates.into_iter().map(Some).collect();
    let keep = match choose {
        Choice::Hypothesis => order.len(),
        Choice::Posteriors => order.len().min(1),
    };
    order
        .into_iter()
        .take(keep)
        .filter_map(|i| slots[i].take())
        .collect()
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
        assert_eq!(most_confident(&[sure.clone(), sure.clone()]), Some(0));
        assert_eq!(most_confident(&[]), None);
        let empty = Array2::zeros((0, 2));
        assert_eq!(most_confident(&[empty.clone(), unsure]), Some(1));
        assert_eq!(most_confident(&[empty.clone(), empty]), Some(0));
    }

    #[test]
    fn training_ranges_give_one_and_their_ends() {
        let vtlp = VtlpConfig::default();
        let f32 = MatmulPrecision::F32;
        let search = Inference::from_training(&vtlp, f32).unwrap();
        assert_eq!(
            search.warp_factors,
            vec![1.0, vtlp.warp_factor[0], vtlp.warp_factor[1]]
        );
        assert_eq!(search.warp_boundary_hz, vtlp.boundary_hz);
        assert_eq!(search.matmul_precision, f32);
        let never = VtlpConfig {
            probability: 0.0,
            ..VtlpConfig::default()
        };
        assert_eq!(Inference::from_training(&never, f32), None);
        let one_sided = VtlpConfig {
            warp_factor: [1.0, 1.1],
            ..VtlpConfig::default()
        };
        assert_eq!(
            Inference::from_training(&one_sided, f32)
                .unwrap()
                .warp_factors,
            vec![1.0, 1.1]
        );
        // Trained with bf16 products: decoded with them, with or without a search.
        let bf16 = MatmulPrecision::Bf16;
        let searched = Inference::from_training(&vtlp, bf16).unwrap();
        assert_eq!(searched.warp_factors, search.warp_factors);
        assert_eq!(searched.matmul_precision, bf16);
        let unwarped = Inference::from_training(&never, bf16).unwrap();
        assert_eq!(unwarped.candidates(), [Candidate::PLAIN]);
        assert_eq!(unwarped.matmul_precision, bf16);
    }

    #[test]
    fn bad_factors_are_rejected_with_the_key_named() {
        let features = FeatureConfig::default();
        let with = |factors: Vec<f64>| Inference {
            warp_factors: factors,
            warp_boundary_hz: 4800.0,
            speed_factors: Vec::new(),
            choose: Default::default(),
            matmul_precision: MatmulPrecision::F32,
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
            speed_factors: Vec::new(),
            choose: Default::default(),
            matmul_precision: MatmulPrecision::F32,
        };
        let frontends = search.frontends(16000).unwrap();
        assert!(frontends[0].warp.is_none());
        assert_eq!(frontends[0].candidate, Candidate::PLAIN);
        assert_eq!(frontends[1].warp.as_ref().unwrap().factor(), 0.9);
    }

    #[test]
    fn tempo_candidates_come_after_the_warps_each_unwarped_and_once() {
        let search = Inference {
            warp_factors: vec![1.0, 0.9, 1.1],
            warp_boundary_hz: 4800.0,
            speed_factors: vec![0.9, 1.0, 1.1],
            choose: Default::default(),
            matmul_precision: MatmulPrecision::F32,
        };
        let c = |speed, warp| Candidate { speed, warp };
        assert_eq!(
            search.candidates(),
            [
                c(1.0, 1.0),
                c(1.0, 0.9),
                c(1.0, 1.1),
                c(0.9, 1.0),
                c(1.1, 1.0)
            ]
        );
        // Played 1.1 times as fast, a second of audio gives about 1/1.1 as many frames.
        let features = FeatureConfig::default();
        let extractor = isogloss_features::FeatureExtractor::new(&features).unwrap();
        let samples: Vec<f32> = (0..16000).map(|i| (i as f32 * 0.05).sin() * 0.1).collect();
        let frontends = search.frontends(16000).unwrap();
        let plain = frontends[0].features(&extractor, &samples).unwrap();
        let fast = frontends[4].features(&extractor, &samples).unwrap();
        assert_eq!(plain, extractor.extract(&samples));
        assert_eq!(plain.nrows(), 98);
        assert_eq!(
            fast,
            extractor.extract(&isogloss_audio::speed_perturb(&samples, 1.1))
        );
        assert!(
            (fast.nrows() as f64 - 98.0 / 1.1).abs() < 2.0,
            "{}",
            fast.nrows()
        );
        for (bad, says) in [
            (vec![0.3], "speed factor"),
            (vec![1.1, 1.1], "listed twice"),
        ] {
            let message = Inference {
                speed_factors: bad,
                ..search.clone()
            }
            .validate(&features)
            .unwrap_err()
            .to_string();
            assert!(
                message.contains("speed_factors") && message.contains(says),
                "{message}"
            );
        }
    }

    #[test]
    fn the_decoder_gets_every_candidate_most_confident_first_or_the_most_confident_alone() {
        let unsure = array![[0.5f32.ln(), 0.5f32.ln()]];
        let sure = array![[0.9f32.ln(), 0.1f32.ln()]];
        let middling = array![[0.7f32.ln(), 0.3f32.ln()]];
        let empty = Array2::zeros((0, 2));
        let candidates = vec![
            (empty, 'e'),
            (unsure, 'u'),
            (sure.clone(), 's'),
            (middling, 'm'),
            (sure, 't'),
        ];
        let tags = |kept: Vec<(Array2<f32>, char)>| -> String {
            kept.into_iter().map(|(_, tag)| tag).collect()
        };
        assert_eq!(
            tags(arrange(Choice::Hypothesis, candidates.clone())),
            "stmue"
        );
        assert_eq!(tags(arrange(Choice::Posteriors, candidates)), "s");
        assert_eq!(tags(arrange::<char>(Choice::Posteriors, Vec::new())), "");
    }

    #[test]
    fn the_choice_is_read_from_model_toml_and_defaults_to_the_decoder() {
        let read = |text: &str| toml::from_str::<Inference>(text);
        let plain = read("warp_factors = [1.0, 0.9]").unwrap();
        assert_eq!(plain.choose, Choice::Hypothesis);
        let by_posteriors = read("warp_factors = [1.0]\nchoose = \"posteriors\"").unwrap();
        assert_eq!(by_posteriors.choose, Choice::Posteriors);
        let message = read("warp_factors = [1.0]\nchoose = \"loudest\"")
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("choose") || message.contains("hypothesis"),
            "{message}"
        );
        // Written back, the choice round-trips.
        let text = toml::to_string(&by_posteriors).unwrap();
        assert_eq!(read(&text).unwrap(), by_posteriors);
    }
}

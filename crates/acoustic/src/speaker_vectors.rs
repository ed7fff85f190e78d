//! Speaker vectors as a second input of the network: an online i-vector appended to every
//! feature frame.
//!
//! The contract, the same in training and in every command that computes posteriors
//! (`transcribe`, `sweep`, `demo`, all through [`crate::AcousticModel::log_posteriors`]):
//! the network reads, for frame t of a feature matrix, the normalised features of frame t
//! followed by the online i-vector of frame t of that same matrix
//! ([`isogloss_speaker::OnlineIvectors`]: the vector recomputed at frames 0, K, 2K, … from the
//! frames of the last W seconds up to that point, held until the next recomputation). The
//! extractor reads the matrix the network reads — features after normalisation (CMVN) — and in
//! training after every perturbation of the epoch (speed, reverberation, noise, band limit,
//! gain, vocal-tract warping) but *before* the SpecAugment masks, which hide parts of what the
//! network sees and are not part of the recording. Each utterance or segment starts a fresh
//! window, so a vector never depends on another utterance and needs no speaker label.
//!
//! Key design decision: the vector is computed from the features of the utterance itself, in
//! every epoch, rather than once per speaker from clean audio. At transcription time the speaker
//! is unknown and the audio may be degraded; a network trained on clean per-speaker vectors
//! would meet vectors at test time it never saw in training.
//!
//! Measured (DEVELOPERS.md, "Speaker vectors in the TDNN"): on the harder demo corpus at an equal
//! 15-minute budget, two pairs of runs side by side, the vectors made WER worse in all 24
//! comparisons (test and five cross conditions, greedy and with an LM) by 0.4–3.5 points, and
//! added 2.5–4.3 s of feature work to epochs of about 60 s. So the table stays off by default.
//!
//! The extractor is trained once, before the network, on the unperturbed normalised training
//! features, and kept in the model directory (`ivector.toml`, `ivector.safetensors`). A copy
//! under the feature cache (`cache/<key>/ivector/`) lets a rerun or `--resume` skip its
//! training when the settings and the training data are unchanged.

use std::path::Path;

use isogloss_speaker::{
    ExtractorConfig, FeatureLayout, IvectorExtractor, TrainingEvent, TrainingStage, Utterance,
    EXTRACTOR_DESCRIPTION, EXTRACTOR_TENSORS,
};
use ndarray::{concatenate, Array2, ArrayView2, Axis};

use crate::AcousticError;

/// Seconds between feature frames of the front ends the models use (10 ms hop).
pub const FEATURE_FRAME_SHIFT_SECONDS: f64 = 0.01;

/// The network input of one utterance or segment: `features` `[frames, dims]` with the online
/// vector of each frame appended, `[frames, dims + R]`. `item` names the utterance in errors
/// (a non-finite feature, features of the wrong dimension).
pub fn with_vectors(
    extractor: &IvectorExtractor,
    item: &str,
    features: ArrayView2<f32>,
) -> Result<Array2<f32>, AcousticError> {
    let vectors = online_vectors(extractor, item, features)?;
    concatenate(Axis(1), &[features, vectors.view()])
        .map_err(|e| AcousticError::Shape(e.to_string()))
}

/// The online vector of every frame of `features` (`[frames, R]`; empty input gives no rows).
pub fn online_vectors(
    extractor: &IvectorExtractor,
    item: &str,
    features: ArrayView2<f32>,
) -> Result<Array2<f32>, AcousticError> {
    if features.nrows() == 0 {
        return Ok(Array2::zeros((0, extractor.output_dimension())));
    }
    Ok(extractor.online_ivectors(item, features)?)
}

/// Id, speaker and unperturbed normalised features of every training utterance: what the
/// extractor is trained on.
pub type TrainingFeatures = Vec<(String, String, Array2<f32>)>;

/// One step of extractor training, for a progress bar.
#[derive(Debug, Clone)]
pub struct ExtractorProgress {
    /// 1-based step.
    pub step: usize,
    /// Steps in all.
    pub steps: usize,
    /// What the step did, in words (e.g. `UBM EM, 64 Gaussians, log-likelihood -52.31`).
    pub stage: String,
}

/// What [`train_extractor`] made, or [`cached_extractor`] found.
pub struct ExtractorOutcome {
    /// The extractor.
    pub extractor: IvectorExtractor,
    /// True when it came from the cache instead of being trained.
    pub cached: bool,
    /// Utterances the training left out, with why (their messages name them).
    pub skipped: Vec<String>,
}

fn describe(stage: &TrainingStage) -> String {
    match stage {
        TrainingStage::Ubm(isogloss_speaker::UbmStep::Em {
            gaussians,
            log_likelihood,
        }) => format!("UBM EM, {gaussians} Gaussians, log-likelihood {log_likelihood:.3}"),
        TrainingStage::Ubm(isogloss_speaker::UbmStep::Kmeans {
            mean_squared_distance,
        }) => format!("UBM k-means, mean squared distance {mean_squared_distance:.3}"),
        TrainingStage::Statistics { utterances } => {
            format!("statistics of {utterances} utterances")
        }
        TrainingStage::TotalVariability {
            iteration,
            log_likelihood,
        } => format!("total variability EM {iteration}, log-likelihood {log_likelihood:.3}"),
        TrainingStage::Postprocessing => "training mean of the vectors".into(),
    }
}

fn layout(dims: usize) -> FeatureLayout {
    FeatureLayout {
        dims,
        frame_shift_seconds: FEATURE_FRAME_SHIFT_SECONDS,
    }
}

/// The extractor in `cache_dir` if one trained with `config` on features of `dims` dimensions is
/// there (an unreadable or different one counts as none: it is trained again). `cache_dir` must
/// be specific to the training data (the caller keys it by the manifest and front end).
pub fn cached_extractor(
    config: &ExtractorConfig,
    dims: usize,
    cache_dir: &Path,
) -> Option<IvectorExtractor> {
    let complete = cache_dir.join(EXTRACTOR_DESCRIPTION).exists()
        && cache_dir.join(EXTRACTOR_TENSORS).exists();
    let extractor = IvectorExtractor::load(cache_dir)
        .ok()
        .filter(|_| complete)?;
    (extractor.config() == config && extractor.layout() == layout(dims)).then_some(extractor)
}

/// Trains the extractor for `config` on `utterances` (id, speaker, features) and saves it in
/// `cache_dir` for [`cached_extractor`].
pub fn train_extractor(
    config: &ExtractorConfig,
    dims: usize,
    cache_dir: &Path,
    utterances: &TrainingFeatures,
    on_progress: &mut dyn FnMut(&ExtractorProgress),
) -> Result<ExtractorOutcome, AcousticError> {
    let views: Vec<Utterance> = utterances
        .iter()
        .map(|(id, speaker, features)| Utterance {
            id,
            speaker,
            features: features.view(),
        })
        .collect();
    let mut skipped = Vec::new();
    let (extractor, _) =
        IvectorExtractor::train(config, layout(dims), &views, &mut |event| match event {
            TrainingEvent::Skipped(error) => skipped.push(error.to_string()),
            TrainingEvent::Step { step, steps, stage } => on_progress(&ExtractorProgress {
                step: *step,
                steps: *steps,
                stage: describe(stage),
            }),
        })?;
    std::fs::create_dir_all(cache_dir).map_err(|source| AcousticError::Io {
        path: cache_dir.to_path_buf(),
        source,
    })?;
    extractor.save(cache_dir)?;
    Ok(ExtractorOutcome {
        extractor,
        cached: false,
        skipped,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tiny_config() -> ExtractorConfig {
        ExtractorConfig {
            dimension: 3,
            iterations: 2,
            top_gaussians: 0,
            frame_stride: 1,
            period_frames: 5,
            window_seconds: 0.2,
            ubm: isogloss_speaker::UbmConfig {
                gaussians: 4,
                iterations: 2,
                ..Default::default()
            },
            ..Default::default()
        }
    }

    fn utterance(offset: f32, frames: usize) -> Array2<f32> {
        Array2::from_shape_fn((frames, 2), |(t, d)| {
            offset + ((t * 7 + d * 3) % 11) as f32 / 5.0
        })
    }

    fn training_utterances() -> TrainingFeatures {
        vec![
            ("a-1".into(), "a".into(), utterance(0.0, 120)),
            ("b-1".into(), "b".into(), utterance(2.0, 90)),
            ("b-2".into(), "b".into(), utterance(1.0, 3)),
        ]
    }

    #[test]
    fn the_vectors_follow_the_online_rule_and_the_cache_holds_the_same_extractor() {
        let dir = tempfile::tempdir().unwrap();
        let config = tiny_config();
        let mut steps = Vec::new();
        assert!(cached_extractor(&config, 2, dir.path()).is_none());
        let first = train_extractor(&config, 2, dir.path(), &training_utterances(), &mut |p| {
            steps.push(p.clone())
        })
        .unwrap();
        // The 3-frame utterance is below `min_frames` (10) and named.
        assert_eq!(first.skipped.len(), 1);
        assert!(first.skipped[0].contains("b-2"), "{:?}", first.skipped);
        assert_eq!(steps.len(), isogloss_speaker::training_steps(&config));
        assert_eq!(
            cached_extractor(&config, 2, dir.path()).as_ref(),
            Some(&first.extractor)
        );
        // Other settings or features: not the cached one.
        let mut other = config.clone();
        other.dimension = 2;
        assert!(cached_extractor(&other, 2, dir.path()).is_none());
        assert!(cached_extractor(&config, 3, dir.path()).is_none());

        let extractor = &first.extractor;
        let features = utterance(0.5, 23);
        let input = with_vectors(extractor, "u", features.view()).unwrap();
        assert_eq!(input.dim(), (23, 5));
        assert_eq!(input.slice(ndarray::s![.., ..2]), features);
        // The definition: frame t holds the i-vector of the window's frames at the last
        // recomputation point u = 5⌊t/5⌋, i.e. frames max(0, u − 19)..=u (W = 0.2 s = 20 frames).
        for t in 0..23usize {
            let u = 5 * (t / 5);
            let window = features.slice(ndarray::s![u.saturating_sub(19)..=u, ..]);
            let stats = extractor.statistics("u", window).unwrap();
            let expected = extractor.ivector_from_statistics(&stats);
            for (got, want) in input.row(t).iter().skip(2).zip(expected.iter()) {
                assert!((got - want).abs() < 1e-5, "frame {t}: {got} vs {want}");
            }
        }
        assert_eq!(
            with_vectors(extractor, "u", features.slice(ndarray::s![..0, ..]))
                .unwrap()
                .dim(),
            (0, 5)
        );
        let mut bad = features.clone();
        bad[(4, 1)] = f32::NAN;
        let error = with_vectors(extractor, "test.tsv:7 (u-7)", bad.view())
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("test.tsv:7 (u-7)") && error.contains("frame 4"),
            "{error}"
        );
    }
}

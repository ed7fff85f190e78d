//! The i-vector extractor: training from utterances grouped by speaker, and extraction per
//! utterance, per speaker, online, or frame by frame in the configured mode.

use std::collections::BTreeMap;

use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;

use crate::config::{ExtractionMode, ExtractorConfig};
use crate::online::OnlineIvectors;
use crate::postprocess::{train_lda, Postprocessing};
use crate::total_variability::TotalVariability;
use crate::ubm::{train_ubm, ubm_steps, BaumWelchStats, DiagGmm, UbmStep};
use crate::SpeakerError;

/// The features an extractor works on: their dimension and frame shift.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FeatureLayout {
    /// Dimensions of a feature frame (39 for MFCC + Δ + ΔΔ, 40 for log-mel).
    pub dims: usize,
    /// Seconds between frames (0.01 for the default front end); turns `window_seconds` into
    /// frames.
    pub frame_shift_seconds: f64,
}

/// One utterance's features with its id and speaker, as training and
/// [`IvectorExtractor::frame_ivectors`] take them.
#[derive(Debug, Clone, Copy)]
pub struct Utterance<'a> {
    /// How errors name the utterance (for example `train.tsv, line 12 (utt-0012)`).
    pub id: &'a str,
    /// The speaker's label.
    pub speaker: &'a str,
    /// Feature frames, `[frames, dims]`.
    pub features: ArrayView2<'a, f32>,
}

/// One finished step of training, for a progress bar.
#[derive(Debug, Clone, PartialEq)]
pub enum TrainingStage {
    /// A UBM step (EM or k-means iteration).
    Ubm(UbmStep),
    /// Baum–Welch statistics of every training utterance collected.
    Statistics {
        /// Utterances.
        utterances: usize,
    },
    /// One EM iteration of T.
    TotalVariability {
        /// 1-based iteration.
        iteration: usize,
        /// Log-likelihood per frame (the T-dependent part, see
        /// [`crate::total_variability`]) under T before this iteration.
        log_likelihood: f64,
    },
    /// Training mean (and LDA) of the i-vectors computed.
    Postprocessing,
}

/// What training reports as it goes.
#[derive(Debug)]
pub enum TrainingEvent<'a> {
    /// An utterance or speaker left out, with why.
    Skipped(&'a SpeakerError),
    /// Step `step` of `steps` done.
    Step {
        /// 1-based step.
        step: usize,
        /// Steps in all ([`training_steps`]).
        steps: usize,
        /// What the step was.
        stage: TrainingStage,
    },
}

/// What a finished training run measured.
#[derive(Debug)]
pub struct TrainingReport {
    /// Utterances trained on.
    pub utterances: usize,
    /// Speakers trained on.
    pub speakers: usize,
    /// Frames trained on.
    pub frames: usize,
    /// Log-likelihood per frame of each UBM EM iteration (before its M-step).
    pub ubm_log_likelihoods: Vec<f64>,
    /// Per-frame log-likelihood (T-dependent part) before each T iteration, then of the final T.
    pub total_variability_log_likelihoods: Vec<f64>,
    /// Utterances and speakers left out, with why.
    pub skipped: Vec<SpeakerError>,
}

/// Steps a training run reports: UBM steps, statistics, T iterations, post-processing.
pub fn training_steps(config: &ExtractorConfig) -> usize {
    ubm_steps(&config.ubm) + 1 + config.iterations + 1
}

/// A trained i-vector extractor: UBM, total-variability matrix, post-processing and the settings
/// it was trained with.
#[derive(Debug, Clone, PartialEq)]
pub struct IvectorExtractor {
    pub(crate) config: ExtractorConfig,
    pub(crate) layout: FeatureLayout,
    pub(crate) ubm: DiagGmm,
    pub(crate) total_variability: TotalVariability,
    pub(crate) postprocessing: Postprocessing,
}

/// Checks that `features` has `dims` columns and only finite values.
pub(crate) fn check_frames(
    item: &str,
    features: ArrayView2<f32>,
    dims: usize,
    first_frame: usize,
) -> Result<(), SpeakerError> {
    if features.ncols() != dims {
        return Err(SpeakerError::DimensionMismatch {
            item: item.to_string(),
            expected: dims,
            found: features.ncols(),
        });
    }
    // The common case, every value finite, in one cheap pass; the position only on failure.
    let all_finite = match features.as_slice() {
        // No early exit: a loop the compiler vectorises.
        Some(values) => values.iter().fold(true, |ok, v| ok & v.is_finite()),
        None => features.iter().all(|v| v.is_finite()),
    };
    if all_finite {
        return Ok(());
    }
    if let Some(((frame, dim), value)) = features.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(SpeakerError::NonFinite {
            item: item.to_string(),
            frame: first_frame + frame,
            dim,
            value: *value,
        });
    }
    Ok(())
}

/// Stacks statistics into N `[items, C]` and F̃ `[items, C·D]`.
fn stack(ubm: &DiagGmm, stats: &[&BaumWelchStats]) -> (Array2<f64>, Array2<f64>) {
    let (gaussians, dims) = (ubm.gaussians(), ubm.dims());
    let mut occupancy = Array2::zeros((stats.len(), gaussians));
    let mut centred = Array2::zeros((stats.len(), gaussians * dims));
    for (i, s) in stats.iter().enumerate() {
        occupancy.row_mut(i).assign(&s.occupancy);
        let flat = s.centred_first_order(ubm);
        centred
            .row_mut(i)
            .assign(&Array1::from_iter(flat.iter().copied()));
    }
    (occupancy, centred)
}

impl IvectorExtractor {
    /// Trains UBM, T and post-processing on `utterances` as `config` says. Utterances with the
    /// wrong dimension, non-finite values or fewer than `min_frames` frames are left out and
    /// reported (as are speakers left with none); training fails only when nothing usable is
    /// left or LDA lacks speakers.
    pub fn train(
        config: &ExtractorConfig,
        layout: FeatureLayout,
        utterances: &[Utterance],
        progress: &mut dyn FnMut(&TrainingEvent),
    ) -> Result<(IvectorExtractor, TrainingReport), SpeakerError> {
        config.validate()?;
        if layout.dims == 0
            || !(layout.frame_shift_seconds > 0.0 && layout.frame_shift_seconds.is_finite())
        {
            return Err(SpeakerError::Training {
                problem: format!(
                    "features of {} dimensions every {} s cannot be modelled",
                    layout.dims, layout.frame_shift_seconds
                ),
            });
        }
        let mut skipped = Vec::new();
        let mut usable: Vec<&Utterance> = Vec::new();
        let mut per_speaker: BTreeMap<&str, (usize, usize)> = BTreeMap::new();
        for utterance in utterances {
            let entry = per_speaker.entry(utterance.speaker).or_default();
            entry.0 += 1;
            let frames = utterance.features.nrows();
            let check = if frames == 0 {
                Err(SpeakerError::NoFrames {
                    item: utterance.id.to_string(),
                })
            } else if frames < config.min_frames {
                Err(SpeakerError::TooFewFrames {
                    item: utterance.id.to_string(),
                    found: frames,
                    min: config.min_frames,
                })
            } else {
                check_frames(utterance.id, utterance.features, layout.dims, 0)
            };
            match check {
                Ok(()) => {
                    entry.1 += 1;
                    usable.push(utterance);
                }
                Err(error) => {
                    progress(&TrainingEvent::Skipped(&error));
                    skipped.push(error);
                }
            }
        }
        for (speaker, (total, kept)) in &per_speaker {
            if *kept == 0 {
                let error = SpeakerError::SpeakerWithoutFrames {
                    speaker: speaker.to_string(),
                    utterances: *total,
                };
                progress(&TrainingEvent::Skipped(&error));
                skipped.push(error);
            }
        }
        if usable.is_empty() {
            return Err(SpeakerError::Training {
                problem: format!(
                    "none of the {} training utterances is usable ({} left out)",
                    utterances.len(),
                    skipped.len()
                ),
            });
        }
        let steps = training_steps(config);
        let mut step = 0;
        let mut report_step = |stage: TrainingStage, progress: &mut dyn FnMut(&TrainingEvent)| {
            step += 1;
            progress(&TrainingEvent::Step { step, steps, stage });
        };

        let views: Vec<ArrayView2<f32>> = usable.iter().map(|u| u.features).collect();
        let (ubm, ubm_log_likelihoods) = train_ubm(&config.ubm, &views, &mut |ubm_step| {
            report_step(TrainingStage::Ubm(ubm_step), progress)
        })?;

        let stats: Vec<BaumWelchStats> = views
            .par_iter()
            .map(|view| {
                ubm.statistics(
                    view.slice(s![..;config.frame_stride, ..]),
                    config.top_gaussians,
                )
            })
            .collect();
        report_step(
            TrainingStage::Statistics {
                utterances: stats.len(),
            },
            progress,
        );
        let frames: usize = stats.iter().map(|s| s.frames).sum();
        let (occupancy, centred) = stack(&ubm, &stats.iter().collect::<Vec<_>>());
        drop(stats);

        let mut total_variability = TotalVariability::random(&ubm, config.dimension, config.seed)?;
        let mut total_variability_log_likelihoods = Vec::new();
        for iteration in 1..=config.iterations {
            let (next, log_likelihood) = total_variability.em_iteration(
                &ubm,
                occupancy.view(),
                centred.view(),
                config.minimum_divergence,
            )?;
            let per_frame = log_likelihood / frames as f64;
            total_variability_log_likelihoods.push(per_frame);
            report_step(
                TrainingStage::TotalVariability {
                    iteration,
                    log_likelihood: per_frame,
                },
                progress,
            );
            total_variability = next;
        }

        let posteriors = total_variability.posteriors(occupancy.view(), centred.view());
        total_variability_log_likelihoods
            .push(posteriors.iter().map(|p| p.log_likelihood).sum::<f64>() / frames as f64);
        let mut ivectors = Array2::<f64>::zeros((posteriors.len(), config.dimension));
        for (mut row, posterior) in ivectors.rows_mut().into_iter().zip(&posteriors) {
            row.assign(&posterior.mean);
        }
        let mean = ivectors.mean_axis(Axis(0));
        if config.subtract_mean {
            if let Some(mean) = &mean {
                ivectors -= mean;
            }
        }
        let lda = if config.lda_dimension > 0 {
            let labels: Vec<&str> = usable.iter().map(|u| u.speaker).collect();
            Some(train_lda(ivectors.view(), &labels, config.lda_dimension)?)
        } else {
            None
        };
        report_step(TrainingStage::Postprocessing, progress);
        let postprocessing = Postprocessing {
            mean: mean.filter(|_| config.subtract_mean),
            lda,
            length_normalize: config.length_normalize,
        };
        let speakers = per_speaker.values().filter(|(_, kept)| *kept > 0).count();
        let report = TrainingReport {
            utterances: usable.len(),
            speakers,
            frames,
            ubm_log_likelihoods,
            total_variability_log_likelihoods,
            skipped,
        };
        Ok((
            IvectorExtractor {
                config: config.clone(),
                layout,
                ubm,
                total_variability,
                postprocessing,
            },
            report,
        ))
    }

    /// An extractor from its parts (for example a UBM and T trained elsewhere). Fails when the
    /// parts' dimensions disagree with each other, the layout or the config.
    pub fn from_parts(
        config: ExtractorConfig,
        layout: FeatureLayout,
        ubm: DiagGmm,
        total_variability: TotalVariability,
        postprocessing: Postprocessing,
    ) -> Result<IvectorExtractor, SpeakerError> {
        config.validate()?;
        let invalid = |problem: String| Err(SpeakerError::InvalidModel { problem });
        if ubm.dims() != layout.dims {
            return invalid(format!(
                "the UBM has {} dimensions, the features {}",
                ubm.dims(),
                layout.dims
            ));
        }
        if ubm.gaussians() != config.ubm.gaussians {
            return invalid(format!(
                "the UBM has {} Gaussians, setting `ubm.gaussians` says {}",
                ubm.gaussians(),
                config.ubm.gaussians
            ));
        }
        let rank = total_variability.rank();
        if rank != config.dimension
            || total_variability.matrix().nrows() != ubm.gaussians() * ubm.dims()
        {
            return invalid(format!(
                "T has shape {:?}, expected [{}, {}] (Gaussians × dims, setting `dimension`)",
                total_variability.matrix().shape(),
                ubm.gaussians() * ubm.dims(),
                config.dimension
            ));
        }
        if postprocessing
            .mean
            .as_ref()
            .is_some_and(|m| m.len() != rank)
            || postprocessing.mean.is_some() != config.subtract_mean
        {
            return invalid(format!(
                "the i-vector mean must be present exactly when `subtract_mean` is on ({}) and have {rank} values",
                config.subtract_mean
            ));
        }
        let lda_shape = postprocessing.lda.as_ref().map(|l| l.dim());
        let expected_lda = (config.lda_dimension > 0).then_some((config.lda_dimension, rank));
        if lda_shape != expected_lda {
            return invalid(format!(
                "LDA projection of shape {lda_shape:?}, setting `lda_dimension` = {} needs {expected_lda:?}",
                config.lda_dimension
            ));
        }
        if postprocessing.length_normalize != config.length_normalize {
            return invalid(
                "`length_normalize` differs between the config and the post-processing".into(),
            );
        }
        Ok(IvectorExtractor {
            config,
            layout,
            ubm,
            total_variability,
            postprocessing,
        })
    }

    /// The settings the extractor was trained with.
    pub fn config(&self) -> &ExtractorConfig {
        &self.config
    }

    /// Dimension and frame shift of the features it takes.
    pub fn layout(&self) -> FeatureLayout {
        self.layout
    }

    /// The UBM.
    pub fn ubm(&self) -> &DiagGmm {
        &self.ubm
    }

    /// The total-variability model.
    pub fn total_variability(&self) -> &TotalVariability {
        &self.total_variability
    }

    /// The post-processing of every vector.
    pub fn postprocessing(&self) -> &Postprocessing {
        &self.postprocessing
    }

    /// Dimension of the vectors handed out (after LDA, if any).
    pub fn output_dimension(&self) -> usize {
        self.postprocessing
            .output_dimension(self.total_variability.rank())
    }

    /// The online window in frames.
    pub fn window_frames(&self) -> usize {
        self.config.window_frames(self.layout.frame_shift_seconds)
    }

    /// Fails with a clear error unless features of `dims` dimensions every `frame_shift_seconds`
    /// fit this extractor; `source` names where they come from (e.g. `models/x/model.toml`).
    pub fn check_front_end(
        &self,
        source: &str,
        dims: usize,
        frame_shift_seconds: f64,
    ) -> Result<(), SpeakerError> {
        if dims != self.layout.dims {
            return Err(SpeakerError::DimensionMismatch {
                item: source.to_string(),
                expected: self.layout.dims,
                found: dims,
            });
        }
        if (frame_shift_seconds - self.layout.frame_shift_seconds).abs() > 1e-9 {
            return Err(SpeakerError::FrameShiftMismatch {
                item: source.to_string(),
                expected: self.layout.frame_shift_seconds,
                found: frame_shift_seconds,
            });
        }
        Ok(())
    }

    /// Baum–Welch statistics of one item's frames under the UBM, as configured (frames 0, s, 2s,
    /// … with s = `frame_stride`; top-N posteriors). Checks dimension and finiteness; any number
    /// of frames is accepted.
    pub fn statistics(
        &self,
        item: &str,
        features: ArrayView2<f32>,
    ) -> Result<BaumWelchStats, SpeakerError> {
        check_frames(item, features, self.layout.dims, 0)?;
        Ok(self.ubm.statistics(
            features.slice(s![..;self.config.frame_stride, ..]),
            self.config.top_gaussians,
        ))
    }

    /// The raw i-vector (posterior mean, before post-processing) of statistics, with the
    /// products in single precision ([`TotalVariability::posterior_means_single`]).
    pub fn raw_ivector(&self, stats: &BaumWelchStats) -> Array1<f64> {
        let occupancy = stats.occupancy.mapv(|v| v as f32).insert_axis(Axis(0));
        let centred = stats.centred_first_order(&self.ubm).mapv(|v| v as f32);
        let centred = centred
            .to_shape((1, centred.len()))
            .map(|c| c.to_owned())
            .unwrap_or_else(|_| Array2::zeros((1, centred.len())));
        self.total_variability
            .posterior_means_single(occupancy.view(), centred.view())
            .row(0)
            .to_owned()
    }

    /// The post-processed i-vector of statistics.
    pub fn ivector_from_statistics(&self, stats: &BaumWelchStats) -> Array1<f32> {
        self.postprocessing.apply(self.raw_ivector(stats).view())
    }

    /// Post-processed i-vectors of many statistics at once, `[items, output dimension]`.
    pub(crate) fn ivectors_from_stacked(
        &self,
        occupancy: ArrayView2<f32>,
        centred: ArrayView2<f32>,
    ) -> Array2<f32> {
        let raw = self
            .total_variability
            .posterior_means_single(occupancy, centred);
        let mut out = Array2::<f32>::zeros((raw.nrows(), self.output_dimension()));
        for (mut row, ivector) in out.rows_mut().into_iter().zip(raw.rows()) {
            row.assign(&self.postprocessing.apply(ivector));
        }
        out
    }

    /// The i-vector of one utterance from all its frames. Fails on a dimension mismatch, a
    /// non-finite value or fewer than `min_frames` frames.
    pub fn extract(
        &self,
        item: &str,
        features: ArrayView2<f32>,
    ) -> Result<Array1<f32>, SpeakerError> {
        self.check_length(item, features.nrows())?;
        let stats = self.statistics(item, features)?;
        Ok(self.ivector_from_statistics(&stats))
    }

    fn check_length(&self, item: &str, frames: usize) -> Result<(), SpeakerError> {
        if frames == 0 {
            return Err(SpeakerError::NoFrames {
                item: item.to_string(),
            });
        }
        if frames < self.config.min_frames {
            return Err(SpeakerError::TooFewFrames {
                item: item.to_string(),
                found: frames,
                min: self.config.min_frames,
            });
        }
        Ok(())
    }

    /// The i-vector of a speaker from the pooled statistics of all `utterances` (their `speaker`
    /// fields are not consulted). Fails on the first unusable utterance, and when the speaker
    /// has no frames or fewer than `min_frames` in all.
    pub fn extract_speaker(
        &self,
        speaker: &str,
        utterances: &[Utterance],
    ) -> Result<Array1<f32>, SpeakerError> {
        let mut pooled = BaumWelchStats::zeros(self.ubm.gaussians(), self.ubm.dims());
        let mut frames = 0;
        for utterance in utterances {
            pooled.add(&self.statistics(utterance.id, utterance.features)?);
            frames += utterance.features.nrows();
        }
        if frames == 0 {
            return Err(SpeakerError::SpeakerWithoutFrames {
                speaker: speaker.to_string(),
                utterances: utterances.len(),
            });
        }
        self.check_length(&format!("speaker {speaker}"), frames)?;
        Ok(self.ivector_from_statistics(&pooled))
    }

    /// A stream for online extraction; `item` names it in errors.
    pub fn online(&self, item: &str) -> OnlineIvectors<'_> {
        OnlineIvectors::new(self, item)
    }

    /// Online i-vectors of every frame of one recording or utterance, `[frames, output dim]`:
    /// the rows [`OnlineIvectors::push`] returns for all frames at once.
    pub fn online_ivectors(
        &self,
        item: &str,
        features: ArrayView2<f32>,
    ) -> Result<Array2<f32>, SpeakerError> {
        if features.nrows() == 0 {
            return Err(SpeakerError::NoFrames {
                item: item.to_string(),
            });
        }
        self.online(item).push(features)
    }

    /// The vector of every frame of every utterance in the configured mode, one matrix
    /// `[frames, output dimension]` per utterance (in order), in parallel:
    ///
    /// * `online`: [`IvectorExtractor::online_ivectors`] of the utterance on its own;
    /// * `utterance`: the utterance's i-vector on every frame;
    /// * `speaker`: the i-vector of the pooled statistics of all usable utterances with the same
    ///   `speaker` on every frame.
    ///
    /// An unusable utterance gets its error and does not stop the others; in speaker mode it is
    /// left out of its speaker's statistics.
    pub fn frame_ivectors(
        &self,
        utterances: &[Utterance],
    ) -> Vec<Result<Array2<f32>, SpeakerError>> {
        let repeat = |vector: &Array1<f32>, frames: usize| {
            vector
                .view()
                .insert_axis(Axis(0))
                .broadcast((frames, vector.len()))
                .map(|b| b.to_owned())
                .unwrap_or_else(|| Array2::zeros((frames, vector.len())))
        };
        match self.config.mode {
            ExtractionMode::Online => utterances
                .par_iter()
                .map(|u| self.online_ivectors(u.id, u.features))
                .collect(),
            ExtractionMode::Utterance => utterances
                .par_iter()
                .map(|u| Ok(repeat(&self.extract(u.id, u.features)?, u.features.nrows())))
                .collect(),
            ExtractionMode::Speaker => {
                let stats: Vec<Result<BaumWelchStats, SpeakerError>> = utterances
                    .par_iter()
                    .map(|u| {
                        if u.features.nrows() == 0 {
                            return Err(SpeakerError::NoFrames {
                                item: u.id.to_string(),
                            });
                        }
                        self.statistics(u.id, u.features)
                    })
                    .collect();
                // Per speaker: pooled statistics, utterances, frames of the usable utterances.
                let mut pooled: BTreeMap<&str, (BaumWelchStats, usize, usize)> = BTreeMap::new();
                for (u, s) in utterances.iter().zip(&stats) {
                    let entry = pooled.entry(u.speaker).or_insert_with(|| {
                        (
                            BaumWelchStats::zeros(self.ubm.gaussians(), self.ubm.dims()),
                            0,
                            0,
                        )
                    });
                    entry.1 += 1;
                    if let Ok(s) = s {
                        entry.0.add(s);
                        entry.2 += u.features.nrows();
                    }
                }
                // `min_frames` ≥ 1, so a speaker with no frames is refused too.
                let speaker_error = |speaker: &str| -> SpeakerError {
                    let (_, count, frames) = &pooled[speaker];
                    if *frames == 0 {
                        SpeakerError::SpeakerWithoutFrames {
                            speaker: speaker.to_string(),
                            utterances: *count,
                        }
                    } else {
                        SpeakerError::TooFewFrames {
                            item: format!("speaker {speaker}"),
                            found: *frames,
                            min: self.config.min_frames,
                        }
                    }
                };
                let vectors: BTreeMap<&str, Option<Array1<f32>>> = pooled
                    .iter()
                    .map(|(speaker, (stats, _, frames))| {
                        let usable = *frames >= self.config.min_frames;
                        (
                            *speaker,
                            usable.then(|| self.ivector_from_statistics(stats)),
                        )
                    })
                    .collect();
                utterances
                    .iter()
                    .zip(stats)
                    .map(|(u, s)| {
                        s?;
                        match &vectors[u.speaker] {
                            Some(vector) => Ok(repeat(vector, u.features.nrows())),
                            None => Err(speaker_error(u.speaker)),
                        }
                    })
                    .collect()
            }
        }
    }
}

//! Cepstral mean and variance normalisation (CMVN), per utterance or per speaker.

use std::collections::BTreeMap;

use ndarray::{Array2, ArrayView2};

use crate::FeatureError;

/// Running per-dimension sums over frames: accumulate utterances, then [`CmvnStats::finish`].
///
/// Sums are kept in f64 so that hours of frames do not lose precision.
#[derive(Debug, Clone, PartialEq)]
pub struct CmvnStats {
    frames: u64,
    sum: Vec<f64>,
    sum_of_squares: Vec<f64>,
}

/// A finished normalisation: subtract `mean`, multiply by `scale` (1/σ, or 1 without variance
/// normalisation or for a dimension that never varies).
#[derive(Debug, Clone, PartialEq)]
pub struct Cmvn {
    mean: Vec<f32>,
    scale: Vec<f32>,
}

impl CmvnStats {
    /// Empty statistics for `dims`-dimensional features.
    pub fn new(dims: usize) -> Self {
        CmvnStats {
            frames: 0,
            sum: vec![0.0; dims],
            sum_of_squares: vec![0.0; dims],
        }
    }

    /// Adds every frame of `features`; `item` names them in the error when dimensions disagree.
    pub fn accumulate(
        &mut self,
        features: ArrayView2<'_, f32>,
        item: &str,
    ) -> Result<(), FeatureError> {
        if features.ncols() != self.sum.len() {
            return Err(FeatureError::DimensionMismatch {
                item: item.to_string(),
                expected: self.sum.len(),
                found: features.ncols(),
            });
        }
        for row in features.rows() {
            for ((sum, square), &value) in self
                .sum
                .iter_mut()
                .zip(self.sum_of_squares.iter_mut())
                .zip(row.iter())
            {
                let value = f64::from(value);
                *sum += value;
                *square += value * value;
            }
        }
        self.frames += features.nrows() as u64;
        Ok(())
    }

    /// Frames accumulated so far.
    pub fn frames(&self) -> u64 {
        self.frames
    }

    /// Mean (and, if `unit_variance`, inverse standard deviation) of what was accumulated.
    pub fn finish(&self, unit_variance: bool, item: &str) -> Result<Cmvn, FeatureError> {
        if self.frames == 0 {
            return Err(FeatureError::NoFrames {
                item: item.to_string(),
            });
        }
        let frames = self.frames as f64;
        let mut mean = Vec::with_capacity(self.sum.len());
        let mut scale = Vec::with_capacity(self.sum.len());
        for (&sum, &square) in self.sum.iter().zip(&self.sum_of_squares) {
            let average = sum / frames;
            let variance = (square / frames - average * average).max(0.0);
            mean.push(average as f32);
            // A dimension that never varies (e.g. floored silence) is left unscaled rather than
            // blowing its rounding noise up to unit variance.
            scale.push(if unit_variance && variance > 1e-10 {
                (1.0 / variance.sqrt()) as f32
            } else {
                1.0
            });
        }
        Ok(Cmvn { mean, scale })
    }
}

impl Cmvn {
    /// Statistics of one utterance (per-utterance CMVN).
    pub fn from_features(
        features: &Array2<f32>,
        unit_variance: bool,
        item: &str,
    ) -> Result<Self, FeatureError> {
        let mut stats = CmvnStats::new(features.ncols());
        stats.accumulate(features.view(), item)?;
        stats.finish(unit_variance, item)
    }

    /// Per-dimension means that are subtracted.
    pub fn mean(&self) -> &[f32] {
        &self.mean
    }

    /// Per-dimension factors applied after subtracting the mean.
    pub fn scale(&self) -> &[f32] {
        &self.scale
    }

    /// Normalises `features` in place; `item` names them in the error when dimensions disagree.
    pub fn apply(&self, features: &mut Array2<f32>, item: &str) -> Result<(), FeatureError> {
        if features.ncols() != self.mean.len() {
            return Err(FeatureError::DimensionMismatch {
                item: item.to_string(),
                expected: self.mean.len(),
                found: features.ncols(),
            });
        }
        for mut row in features.rows_mut() {
            for ((value, mean), scale) in row.iter_mut().zip(&self.mean).zip(&self.scale) {
                *value = (*value - mean) * scale;
            }
        }
        Ok(())
    }
}

/// Per-speaker CMVN: accumulate every utterance of every speaker, then normalise each utterance
/// with its speaker's pooled statistics.
#[derive(Debug, Clone)]
pub struct SpeakerCmvnStats {
    dims: usize,
    by_speaker: BTreeMap<String, CmvnStats>,
}

impl SpeakerCmvnStats {
    /// No speakers yet, for `dims`-dimensional features.
    pub fn new(dims: usize) -> Self {
        SpeakerCmvnStats {
            dims,
            by_speaker: BTreeMap::new(),
        }
    }

    /// Adds one utterance of `speaker`.
    pub fn accumulate(
        &mut self,
        speaker: &str,
        features: ArrayView2<'_, f32>,
    ) -> Result<(), FeatureError> {
        let dims = self.dims;
        self.by_speaker
            .entry(speaker.to_string())
            .or_insert_with(|| CmvnStats::new(dims))
            .accumulate(features, &format!("speaker {speaker}"))
    }

    /// The normalisation of every speaker seen, by speaker name.
    pub fn finish(&self, unit_variance: bool) -> Result<BTreeMap<String, Cmvn>, FeatureError> {
        self.by_speaker
            .iter()
            .map(|(speaker, stats)| {
                let cmvn = stats.finish(unit_variance, &format!("speaker {speaker}"))?;
                Ok((speaker.clone(), cmvn))
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, concatenate, Axis};

    #[test]
    fn utterance_cmvn_gives_zero_mean_unit_variance() {
        let mut features = array![[1.0f32, 10.0, 5.0], [3.0, 30.0, 5.0], [5.0, 20.0, 5.0]];
        Cmvn::from_features(&features, true, "u1")
            .unwrap()
            .apply(&mut features, "u1")
            .unwrap();
        for column in features.columns() {
            let mean = column.mean().unwrap();
            assert!(mean.abs() < 1e-6);
        }
        // Population variance 1 for the columns that vary; the constant column is only centred.
        for column in 0..2 {
            let variance = features.column(column).mapv(|v| v * v).mean().unwrap();
            assert!((variance - 1.0).abs() < 1e-5);
        }
        assert!(features.column(2).iter().all(|&v| v == 0.0));
    }

    #[test]
    fn mean_only_cmvn_keeps_the_spread() {
        let mut features = array![[1.0f32], [3.0]];
        Cmvn::from_features(&features, false, "u1")
            .unwrap()
            .apply(&mut features, "u1")
            .unwrap();
        assert_eq!(features, array![[-1.0f32], [1.0]]);
    }

    #[test]
    fn speaker_statistics_pool_all_utterances_of_a_speaker() {
        let first = array![[1.0f32, 2.0], [3.0, 4.0]];
        let second = array![[5.0f32, 0.0]];
        let other = array![[100.0f32, 100.0]];
        let mut stats = SpeakerCmvnStats::new(2);
        stats.accumulate("anna", first.view()).unwrap();
        stats.accumulate("bo", other.view()).unwrap();
        stats.accumulate("anna", second.view()).unwrap();
        let by_speaker = stats.finish(true).unwrap();
        let pooled = concatenate(Axis(0), &[first.view(), second.view()]).unwrap();
        assert_eq!(
            by_speaker["anna"],
            Cmvn::from_features(&pooled, true, "x").unwrap()
        );
        assert_eq!(by_speaker["bo"].mean(), &[100.0, 100.0]);
    }

    #[test]
    fn mismatched_dimensions_and_empty_statistics_are_errors() {
        let mut stats = SpeakerCmvnStats::new(39);
        let error = stats
            .accumulate("anna", array![[1.0f32]].view())
            .unwrap_err();
        assert!(error.to_string().contains("speaker anna") && error.to_string().contains("39"));
        let error = CmvnStats::new(3).finish(true, "utt7").unwrap_err();
        assert!(error.to_string().contains("utt7"));
        let cmvn = Cmvn::from_features(&array![[1.0f32, 2.0]], true, "a").unwrap();
        assert!(cmvn.apply(&mut Array2::zeros((4, 3)), "b").is_err());
    }
}

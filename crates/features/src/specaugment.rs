//! SpecAugment-style time and frequency masks for training.

use ndarray::Array2;
use rand::Rng;
use serde::{Deserialize, Serialize};

/// What masked cells are set to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum MaskFill {
    /// Zero: the mean after CMVN, which is where masks are usually applied.
    #[default]
    Zero,
    /// The utterance mean of each dimension (for features that were not normalised).
    Mean,
}

/// Time and frequency masking after Park et al. (2019), "SpecAugment": `time_masks` runs of
/// consecutive frames and `frequency_masks` runs of consecutive feature dimensions are blanked,
/// each run's width drawn uniformly from 0…max and its start uniformly where it fits. The caller's
/// random number generator drives every draw, so a seeded generator reproduces an epoch.
///
/// With Δ features the frequency axis is the static block repeated; [`SpecAugment::apply_blocks`]
/// masks the same coefficients in every block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SpecAugment {
    /// Number of time masks per utterance.
    pub time_masks: usize,
    /// Widest time mask, in frames.
    pub max_time_width: usize,
    /// A time mask never covers more than this fraction of the utterance's frames.
    pub max_time_fraction: f64,
    /// Number of frequency masks per utterance.
    pub frequency_masks: usize,
    /// Widest frequency mask, in feature dimensions (of one block).
    pub max_frequency_width: usize,
    /// Value written into masked cells.
    pub fill: MaskFill,
}

impl Default for SpecAugment {
    /// Two time masks of up to 20 frames (≤ 20 % of the utterance) and two frequency masks of up to
    /// 5 dimensions: a mild policy for small corpora (the paper's policies use up to 100 frames on
    /// 80 mel bins; scaled down here by judgement, not taken from a source).
    fn default() -> Self {
        SpecAugment {
            time_masks: 2,
            max_time_width: 20,
            max_time_fraction: 0.2,
            frequency_masks: 2,
            max_frequency_width: 5,
            fill: MaskFill::Zero,
        }
    }
}

impl SpecAugment {
    /// Masks `features` `[frames, dims]` in place, treating all dims as one frequency axis.
    pub fn apply(&self, features: &mut Array2<f32>, rng: &mut impl Rng) {
        self.apply_blocks(features, 1, rng);
    }

    /// Masks `features` in place, where the dims are `blocks` equal blocks (static, Δ, ΔΔ) and a
    /// frequency mask covers the same columns of every block. If dims is not a multiple of
    /// `blocks`, the whole width is treated as one block.
    pub fn apply_blocks(&self, features: &mut Array2<f32>, blocks: usize, rng: &mut impl Rng) {
        let (frames, dims) = features.dim();
        if frames == 0 || dims == 0 {
            return;
        }
        let blocks = if blocks > 0 && dims % blocks == 0 {
            blocks
        } else {
            1
        };
        let block_width = dims / blocks;
        let fill: Vec<f32> = match self.fill {
            MaskFill::Zero => vec![0.0; dims],
            MaskFill::Mean => features
                .mean_axis(ndarray::Axis(0))
                .map(|mean| mean.to_vec())
                .unwrap_or_else(|| vec![0.0; dims]),
        };
        let time_limit = self
            .max_time_width
            .min((self.max_time_fraction.clamp(0.0, 1.0) * frames as f64) as usize);
        for _ in 0..self.time_masks {
            let (start, width) = draw_run(rng, time_limit, frames);
            for mut row in features.rows_mut().into_iter().skip(start).take(width) {
                row.assign(&ndarray::ArrayView1::from(&fill[..]));
            }
        }
        for _ in 0..self.frequency_masks {
            let (start, width) = draw_run(rng, self.max_frequency_width, block_width);
            for block in 0..blocks {
                let first = block * block_width + start;
                for (offset, &value) in fill[first..first + width].iter().enumerate() {
                    features.column_mut(first + offset).fill(value);
                }
            }
        }
    }
}

/// A run of width 0…min(max_width, length) starting where it fits in 0…length.
fn draw_run(rng: &mut impl Rng, max_width: usize, length: usize) -> (usize, usize) {
    let width = rng.random_range(0..=max_width.min(length));
    let start = rng.random_range(0..=length - width);
    (start, width)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    fn ones(frames: usize, dims: usize) -> Array2<f32> {
        Array2::from_elem((frames, dims), 1.0)
    }

    #[test]
    fn masks_stay_within_their_configured_widths() {
        let policy = SpecAugment {
            time_masks: 1,
            max_time_width: 7,
            max_time_fraction: 1.0,
            frequency_masks: 1,
            max_frequency_width: 3,
            fill: MaskFill::Zero,
        };
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut saw_a_mask = false;
        for _ in 0..200 {
            let mut features = ones(100, 39);
            policy.apply_blocks(&mut features, 3, &mut rng);
            let masked_rows = features
                .rows()
                .into_iter()
                .filter(|r| r.iter().all(|&v| v == 0.0))
                .count();
            let masked_columns: Vec<usize> = (0..39)
                .filter(|&c| features.column(c).iter().all(|&v| v == 0.0))
                .collect();
            assert!(masked_rows <= 7);
            assert!(masked_columns.len() <= 9, "{masked_columns:?}");
            // The same coefficients are masked in the static, Δ and ΔΔ blocks.
            for &c in &masked_columns {
                assert!(masked_columns.contains(&((c + 13) % 39)));
            }
            saw_a_mask |= masked_rows > 0 && !masked_columns.is_empty();
        }
        assert!(saw_a_mask);
    }

    #[test]
    fn time_masks_respect_the_fraction_of_short_utterances() {
        let policy = SpecAugment {
            time_masks: 1,
            max_time_width: 50,
            max_time_fraction: 0.2,
            frequency_masks: 0,
            ..SpecAugment::default()
        };
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        for _ in 0..100 {
            let mut features = ones(10, 4);
            policy.apply(&mut features, &mut rng);
            assert!(features.iter().filter(|&&v| v == 0.0).count() <= 2 * 4);
        }
    }

    #[test]
    fn the_same_seed_gives_the_same_masks_and_mean_fill_uses_column_means() {
        let policy = SpecAugment {
            fill: MaskFill::Mean,
            ..SpecAugment::default()
        };
        let base = Array2::from_shape_fn((60, 13), |(t, d)| (t * 13 + d) as f32);
        let mut a = base.clone();
        let mut b = base.clone();
        policy.apply(&mut a, &mut ChaCha8Rng::seed_from_u64(42));
        policy.apply(&mut b, &mut ChaCha8Rng::seed_from_u64(42));
        assert_eq!(a, b);
        let means = base.mean_axis(ndarray::Axis(0)).unwrap();
        for ((t, d), &value) in a.indexed_iter() {
            assert!(value == base[(t, d)] || value == means[d]);
        }
    }

    #[test]
    fn empty_features_and_zero_policies_are_left_alone() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut empty = Array2::<f32>::zeros((0, 39));
        SpecAugment::default().apply(&mut empty, &mut rng);
        let none = SpecAugment {
            time_masks: 0,
            frequency_masks: 0,
            ..SpecAugment::default()
        };
        let mut features = ones(20, 13);
        none.apply(&mut features, &mut rng);
        assert_eq!(features, ones(20, 13));
    }
}

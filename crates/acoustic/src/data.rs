//! Training material as the training loop sees it: per utterance an id, unit labels, a length
//! for bucketing, and features drawn afresh for every epoch.
//!
//! The loop asks [`TrainingData::features`] for each utterance of a batch, in parallel, with a
//! random generator keyed by `(seed, epoch, utterance)` ([`utterance_rng`]): what an utterance
//! looks like in an epoch (speed, room, noise, warp, masks) therefore depends on nothing but those
//! three numbers — not on the batch it falls in, the thread that computes it or how many threads
//! there are — which keeps resumed runs identical to uninterrupted ones.

use ndarray::Array2;
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Training utterances whose features are produced per epoch (augmentation happens inside).
pub trait TrainingData: Sync {
    /// Number of utterances.
    fn len(&self) -> usize;
    /// True when there are none.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Utterance id (for messages).
    fn id(&self, index: usize) -> &str;
    /// Unit indices (no blank).
    fn labels(&self, index: usize) -> &[u32];
    /// Frames of the unperturbed features; batches are bucketed by it.
    fn frames(&self, index: usize) -> usize;
    /// The features of utterance `index` for one epoch, drawn with `rng`. `fits(frames)` says
    /// whether a matrix of that many frames still holds the labels; a perturbation that makes the
    /// utterance too short must not be returned (return the unperturbed features instead).
    fn features(
        &self,
        index: usize,
        rng: &mut ChaCha8Rng,
        fits: &dyn Fn(usize) -> bool,
    ) -> Array2<f32>;
    /// True when this process holds the utterance's features (always, except for a rank's view
    /// of a data-parallel run's training set, [`ShardedSet`]).
    fn is_local(&self, index: usize) -> bool {
        let _ = index;
        true
    }
}

/// A rank's view of the training set of a data-parallel run: every utterance of the whole set
/// by its index in it (the index a single process would give it: its ids and lengths, so that
/// every rank cuts the same batches and keys the same random streams), features only for the
/// rank's own share, held by `local` under its own indices.
pub struct ShardedSet<'a> {
    local: &'a dyn TrainingData,
    ids: Vec<String>,
    frames: Vec<usize>,
    local_index: Vec<Option<usize>>,
}

impl<'a> ShardedSet<'a> {
    /// The whole set's `ids` and `frames`; `local_index[i]` is utterance `i`'s index in `local`
    /// when this rank holds it. The three lists must have the same length.
    pub fn new(
        local: &'a dyn TrainingData,
        ids: Vec<String>,
        frames: Vec<usize>,
        local_index: Vec<Option<usize>>,
    ) -> Result<Self, crate::AcousticError> {
        if ids.len() != frames.len() || ids.len() != local_index.len() {
            return Err(crate::AcousticError::Shape(format!(
                "a sharded training set of {} ids, {} lengths and {} owner entries",
                ids.len(),
                frames.len(),
                local_index.len()
            )));
        }
        if local_index.iter().flatten().any(|&k| k >= local.len()) {
            return Err(crate::AcousticError::Shape(format!(
                "a sharded training set pointing past the {} utterances of its share",
                local.len()
            )));
        }
        Ok(ShardedSet {
            local,
            ids,
            frames,
            local_index,
        })
    }
}

impl TrainingData for ShardedSet<'_> {
    fn len(&self) -> usize {
        self.frames.len()
    }

    fn id(&self, index: usize) -> &str {
        &self.ids[index]
    }

    fn labels(&self, index: usize) -> &[u32] {
        match self.local_index[index] {
            Some(k) => self.local.labels(k),
            None => &[],
        }
    }

    fn frames(&self, index: usize) -> usize {
        self.frames[index]
    }

    /// Another rank's utterance has no features here: an empty matrix (the training loop
    /// only asks for local ones).
    fn features(
        &self,
        index: usize,
        rng: &mut ChaCha8Rng,
        fits: &dyn Fn(usize) -> bool,
    ) -> Array2<f32> {
        match self.local_index[index] {
            Some(k) => self.local.features(k, rng, fits),
            None => Array2::zeros((0, 0)),
        }
    }

    fn is_local(&self, index: usize) -> bool {
        self.local_index[index].is_some()
    }
}

/// Augments a feature matrix in place (e.g. SpecAugment masks), with the utterance's generator.
pub type Augment = dyn Fn(&mut Array2<f32>, &mut dyn RngCore) + Sync;

/// One utterance with precomputed features: `variants[0]` unperturbed, the others perturbed
/// copies of which one is drawn per epoch.
#[derive(Debug, Clone)]
pub struct PreparedUtterance {
    /// Utterance id (for messages).
    pub id: String,
    /// `[frames, dims]` features, already normalised.
    pub variants: Vec<Array2<f32>>,
    /// Unit indices (no blank).
    pub labels: Vec<u32>,
}

/// Precomputed features as [`TrainingData`]: a variant drawn per epoch, then `augment`.
pub struct PreparedSet<'a> {
    /// The utterances.
    pub utterances: &'a [PreparedUtterance],
    /// Applied to the drawn variant (a copy), if any.
    pub augment: Option<&'a Augment>,
}

impl TrainingData for PreparedSet<'_> {
    fn len(&self) -> usize {
        self.utterances.len()
    }

    fn id(&self, index: usize) -> &str {
        &self.utterances[index].id
    }

    fn labels(&self, index: usize) -> &[u32] {
        &self.utterances[index].labels
    }

    fn frames(&self, index: usize) -> usize {
        self.utterances[index]
            .variants
            .first()
            .map_or(0, |v| v.nrows())
    }

    fn features(
        &self,
        index: usize,
        rng: &mut ChaCha8Rng,
        fits: &dyn Fn(usize) -> bool,
    ) -> Array2<f32> {
        let variants = &self.utterances[index].variants;
        let drawn = &variants[rng.random_range(0..variants.len())];
        let mut matrix = if fits(drawn.nrows()) {
            drawn.clone()
        } else {
            variants[0].clone()
        };
        if let Some(augment) = self.augment {
            augment(&mut matrix, rng);
        }
        matrix
    }
}

/// The generator of utterance `index` in `epoch`: a ChaCha stream whose seed mixes the three
/// numbers (SplitMix64 finalisers, so nearby inputs give unrelated streams).
pub fn utterance_rng(seed: u64, epoch: usize, index: usize) -> ChaCha8Rng {
    fn mix(mut z: u64) -> u64 {
        z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    let key = mix(mix(mix(seed) ^ epoch as u64) ^ index as u64);
    ChaCha8Rng::seed_from_u64(key)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utterance_streams_depend_on_seed_epoch_and_index_only() {
        let draw = |s, e, i| utterance_rng(s, e, i).random::<u64>();
        assert_eq!(draw(1, 2, 3), draw(1, 2, 3));
        assert_ne!(draw(1, 2, 3), draw(1, 2, 4));
        assert_ne!(draw(1, 2, 3), draw(1, 3, 3));
        assert_ne!(draw(1, 2, 3), draw(2, 2, 3));
        // Swapping epoch and index must not give the same stream.
        assert_ne!(draw(1, 2, 3), draw(1, 3, 2));
    }

    #[test]
    fn a_variant_too_short_for_the_labels_falls_back_to_the_unperturbed_features() {
        let utterances = vec![PreparedUtterance {
            id: "u".into(),
            variants: vec![Array2::ones((30, 2)), Array2::zeros((3, 2))],
            labels: vec![1, 2],
        }];
        let set = PreparedSet {
            utterances: &utterances,
            augment: None,
        };
        for index in 0..20 {
            let mut rng = utterance_rng(0, 1, index);
            let matrix = set.features(0, &mut rng, &|frames| frames >= 10);
            assert_eq!(matrix.nrows(), 30);
        }
    }
}

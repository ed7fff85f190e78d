//! Building a back-off model from explicit n-gram probabilities, computing every back-off
//! weight so that each context sums to one. Mixing and pruning both end here.
//!
//! For a context h with listed extensions S(h):
//! `bo(h) = (1 − Σ_{w∈S(h)} P(w | h)) / (1 − Σ_{w∈S(h)} P_bo(w | h'))`, where `P_bo` is the
//! back-off probability of the (already complete) lower orders (Katz 1987, common practice).

use std::collections::HashMap;

use crate::error::LmError;
use crate::model::{ArpaModel, ModelBuilder};

/// Explicit probabilities (linear) per order; `ngrams[n-1]` holds the n-grams of order n as word
/// indices into `words`. Every prefix and suffix of a listed n-gram must be listed too.
pub(crate) struct ExplicitModel {
    pub(crate) words: Vec<String>,
    pub(crate) ngrams: Vec<HashMap<Vec<u32>, f64>>,
}

/// Back-off probability through explicit probabilities and computed weights.
fn backoff_probability(
    ngrams: &[HashMap<Vec<u32>, f64>],
    backoffs: &[HashMap<Vec<u32>, f64>],
    ngram: &[u32],
) -> f64 {
    let n = ngram.len();
    if let Some(&probability) = ngrams[n - 1].get(ngram) {
        return probability;
    }
    if n == 1 {
        return 0.0;
    }
    let weight = backoffs[n - 2].get(&ngram[..n - 1]).copied().unwrap_or(1.0);
    weight * backoff_probability(ngrams, backoffs, &ngram[1..])
}

impl ExplicitModel {
    /// Computes the back-off weights and freezes the model (n-grams written in sorted order).
    pub(crate) fn into_model(self) -> Result<ArpaModel, LmError> {
        let order = self.ngrams.len();
        let mut backoffs: Vec<HashMap<Vec<u32>, f64>> = vec![HashMap::new(); order];
        for n in 2..=order {
            let mut sums: HashMap<&[u32], (f64, f64)> = HashMap::new();
            for (ngram, &probability) in &self.ngrams[n - 1] {
                let lower = backoff_probability(&self.ngrams, &backoffs, &ngram[1..]);
                let entry = sums.entry(&ngram[..n - 1]).or_insert((0.0, 0.0));
                entry.0 += probability;
                entry.1 += lower;
            }
            let weights: HashMap<Vec<u32>, f64> = sums
                .into_iter()
                .map(|(context, (explicit, lower))| {
                    let numerator = (1.0 - explicit).max(0.0);
                    let denominator = 1.0 - lower;
                    let weight = if denominator > 1e-15 {
                        numerator / denominator
                    } else {
                        1.0
                    };
                    (context.to_vec(), weight)
                })
                .collect();
            backoffs[n - 2] = weights;
        }
        let counts: Vec<usize> = self.ngrams.iter().map(HashMap::len).collect();
        let mut builder = ModelBuilder::new(&counts);
        let describe = |ngram: &[u32]| {
            ngram
                .iter()
                .map(|&word| self.words[word as usize].as_str())
                .collect::<Vec<_>>()
                .join(" ")
        };
        for n in 1..=order {
            let mut sorted: Vec<(&Vec<u32>, f64)> = self.ngrams[n - 1]
                .iter()
                .map(|(ngram, &probability)| (ngram, probability))
                .collect();
            sorted.sort_unstable_by(|left, right| left.0.cmp(right.0));
            for (ngram, probability) in sorted {
                let log10_prob = if probability > 0.0 {
                    probability.log10()
                } else {
                    -99.0
                };
                let log10_backoff = if n < order {
                    backoffs[n - 1].get(ngram).map_or(0.0, |&weight| {
                        if weight > 0.0 {
                            weight.log10()
                        } else {
                            -99.0
                        }
                    })
                } else {
                    0.0
                };
                let added = if n == 1 {
                    builder.add_unigram(&self.words[ngram[0] as usize], log10_prob, log10_backoff)
                } else {
                    builder.add_ngram(ngram, log10_prob, log10_backoff)
                };
                added.map_err(|problem| LmError::Invalid(problem.describe(&describe(ngram))))?;
            }
        }
        Ok(builder.finish())
    }
}

//! Relative-entropy pruning (Stolcke 1998, "Entropy-based pruning of backoff language models").
//!
//! Removing the n-gram (h, w) changes the model only in context h: P(w | h) becomes
//! bo'(h)·P(w | h') and the back-off weight becomes
//! `bo'(h) = (1 − Σ_{v∈S(h)} P(v|h) + P(w|h)) / (1 − Σ_{v∈S(h)} P(v|h') + P(w|h'))`.
//! The relative entropy between the old and new model is (Stolcke's eq. 3–5, natural log)
//!
//! ```text
//! D = −P(h) · { P(w|h) [ln P'(w|h) − ln P(w|h)] + (1 − Σ_{v∈S(h)} P(v|h)) [ln bo'(h) − ln bo(h)] }
//! ```
//!
//! with P(h) the product of the model's own probabilities along h (`<s>` has probability 1).
//! Every n-gram of order ≥ 2 whose D is below the threshold is removed — all judged against the
//! original model, as in the paper — except prefixes and suffixes of n-grams that stay (the ARPA
//! form needs them); unigrams always stay. Back-off weights are then recomputed.

use std::collections::HashMap;

use crate::error::LmError;
use crate::model::{ArpaModel, WordIndex};
use crate::rebuild::ExplicitModel;

/// Prunes `model` at `threshold` (relative entropy in nats); returns the pruned model.
pub fn prune(model: &ArpaModel, threshold: f64) -> Result<ArpaModel, LmError> {
    if !(threshold >= 0.0 && threshold.is_finite()) {
        return Err(LmError::Invalid(format!(
            "pruning: expected a threshold ≥ 0, found {threshold}"
        )));
    }
    let order = model.order();
    let counts = model.ngram_counts();
    let start = model.sentence_start_word().map(|word| word.0);
    let mut words = Vec::new();
    let probability = |ngram: &[u32]| {
        let context: Vec<WordIndex> = ngram[..ngram.len() - 1]
            .iter()
            .map(|&word| WordIndex(word))
            .collect();
        10f64.powf(model.log10_probability(&context, WordIndex(ngram[ngram.len() - 1])))
    };
    // P(h) for every n-gram used as a context, by the chain rule along its prefixes.
    let mut history_probability: Vec<Vec<f64>> = Vec::with_capacity(order);
    history_probability.push(
        (0..counts[0] as u32)
            .map(|word| {
                if Some(word) == start {
                    1.0
                } else {
                    probability(&[word])
                }
            })
            .collect(),
    );
    for n in 2..order {
        let mut level = Vec::with_capacity(counts[n - 1]);
        for id in 0..counts[n - 1] as u32 {
            model.ngram_words(n, id, &mut words);
            let prefix = model.find(&words[..n - 1]).unwrap_or(0);
            level.push(history_probability[n - 2][prefix as usize] * probability(&words));
        }
        history_probability.push(level);
    }
    // Per context: Σ P(v|h) and Σ P(v|h') over its listed extensions.
    let mut sums: Vec<HashMap<u32, (f64, f64)>> = vec![HashMap::new(); order];
    let mut values: Vec<Vec<(f64, f64)>> = vec![Vec::new(); order];
    for n in 2..=order {
        for id in 0..counts[n - 1] as u32 {
            model.ngram_words(n, id, &mut words);
            let explicit = probability(&words);
            let lower = probability(&words[1..]);
            let context = model.find(&words[..n - 1]).unwrap_or(0);
            let entry = sums[n - 1].entry(context).or_insert((0.0, 0.0));
            entry.0 += explicit;
            entry.1 += lower;
            values[n - 1].push((explicit, lower));
        }
    }
    // Decide from the top order down, keeping what longer kept n-grams need.
    let mut keep: Vec<Vec<bool>> = counts.iter().map(|&count| vec![false; count]).collect();
    keep[0].iter_mut().for_each(|flag| *flag = true);
    for n in (2..=order).rev() {
        for id in 0..counts[n - 1] as u32 {
            model.ngram_words(n, id, &mut words);
            let context = model.find(&words[..n - 1]).unwrap_or(0);
            if !keep[n - 1][id as usize] {
                let (explicit, lower) = values[n - 1][id as usize];
                let (sum_explicit, sum_lower) = sums[n - 1][&context];
                let left = 1.0 - sum_explicit;
                let backoff = model.entry_values(n - 1, context).1 * std::f64::consts::LN_10;
                let new_backoff = ((left + explicit) / (1.0 - sum_lower + lower)).ln();
                let new_probability = new_backoff + lower.ln();
                let divergence = -history_probability[n - 2][context as usize]
                    * (explicit * (new_probability - explicit.ln())
                        + left * (new_backoff - backoff));
                // A NaN (degenerate context) keeps the n-gram.
                keep[n - 1][id as usize] = divergence.is_nan() || divergence >= threshold;
            }
            if keep[n - 1][id as usize] && n > 2 {
                let prefix = model.find(&words[..n - 1]).unwrap_or(0);
                let suffix = model.find(&words[1..]).unwrap_or(0);
                keep[n - 2][prefix as usize] = true;
                keep[n - 2][suffix as usize] = true;
            }
        }
    }
    let mut ngrams: Vec<HashMap<Vec<u32>, f64>> = vec![HashMap::new(); order];
    for n in 1..=order {
        for id in 0..counts[n - 1] as u32 {
            if keep[n - 1][id as usize] {
                model.ngram_words(n, id, &mut words);
                let log10_prob = model.entry_values(n, id).0;
                ngrams[n - 1].insert(words.clone(), 10f64.powf(log10_prob));
            }
        }
    }
    ExplicitModel {
        words: model.vocabulary().map(str::to_string).collect(),
        ngrams,
    }
    .into_model()
}

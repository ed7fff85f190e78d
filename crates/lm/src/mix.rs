//! Linear interpolation of several models: weights by EM on a tuning text, merged into one
//! back-off model.
//!
//! The mixture is `P(w | h) = Σ_k λ_k P_k(w | h)` over the union of the vocabularies, where a
//! word a component does not know has probability 0 in it and a history word it does not know is
//! its `<unk>`. EM (Dempster, Laird & Rubin 1977; the usual update for mixture weights) maximises
//! the tuning text's likelihood; the log-likelihood is concave in λ, so it finds the optimum, which
//! is never worse than any single component (those are corners of the simplex).
//!
//! The merged model lists the union of the components' n-grams plus the n-grams of the tuning
//! text (with all their prefixes and suffixes), each with its exact mixture probability, and
//! recomputes every back-off weight. It therefore equals the mixture on every listed n-gram — the
//! tuning text's perplexity is exactly the mixture's — and sums to one everywhere; an n-gram that
//! none lists backs off, which approximates the mixture (as every back-off merge does).

use std::collections::HashMap;

use crate::error::LmError;
use crate::eval::{Perplexity, SentenceScorer};
use crate::model::{ArpaModel, WordIndex, SENTENCE_START, UNKNOWN_WORD};
use crate::rebuild::ExplicitModel;

/// A weighted mixture of models over the union of their vocabularies.
pub struct Mixture<'a> {
    models: &'a [ArpaModel],
    weights: Vec<f64>,
    words: Vec<String>,
    index: HashMap<String, u32>,
    /// `component_index[k][w]`: the index of mixture word w in model k.
    component_index: Vec<Vec<Option<WordIndex>>>,
}

impl<'a> Mixture<'a> {
    /// A mixture with the given weights (they are normalised to sum to one).
    pub fn new(models: &'a [ArpaModel], weights: &[f64]) -> Result<Self, LmError> {
        if models.is_empty() || models.len() != weights.len() {
            return Err(LmError::Invalid(format!(
                "mixing: expected one weight per model and at least one model, found {} models and {} weights",
                models.len(),
                weights.len()
            )));
        }
        let total: f64 = weights.iter().sum();
        if weights
            .iter()
            .any(|&weight| weight.is_nan() || weight < 0.0)
            || total.is_nan()
            || total <= 0.0
        {
            return Err(LmError::Invalid(format!(
                "mixing: expected non-negative weights with a positive sum, found {weights:?}"
            )));
        }
        let mut words = Vec::new();
        let mut index = HashMap::new();
        for model in models {
            for word in model.vocabulary() {
                if !index.contains_key(word) {
                    index.insert(word.to_string(), words.len() as u32);
                    words.push(word.to_string());
                }
            }
        }
        let component_index = models
            .iter()
            .map(|model| words.iter().map(|word| model.word_index(word)).collect())
            .collect();
        Ok(Mixture {
            models,
            weights: weights.iter().map(|weight| weight / total).collect(),
            words,
            index,
            component_index,
        })
    }

    /// The normalised weights.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// `P_k(w | h)` (linear) for each component, history and word given as mixture indices.
    fn component_probabilities(&self, history: &[WordIndex], word: WordIndex, out: &mut Vec<f64>) {
        out.clear();
        for (component, model) in self.models.iter().enumerate() {
            let map = &self.component_index[component];
            let Some(word) = map[word.0 as usize] else {
                out.push(0.0);
                continue;
            };
            let mut context = Vec::with_capacity(history.len());
            for &past in history {
                match map[past.0 as usize].or(model.unknown_word()) {
                    Some(index) => context.push(index),
                    None => context.clear(),
                }
            }
            out.push(10f64.powf(model.log10_probability(&context, word)));
        }
    }
}

impl SentenceScorer for Mixture<'_> {
    fn index(&self, word: &str) -> Option<WordIndex> {
        self.index.get(word).map(|&index| WordIndex(index))
    }
    fn unknown(&self) -> Option<WordIndex> {
        self.index(UNKNOWN_WORD)
    }
    fn start(&self) -> Option<WordIndex> {
        self.index(SENTENCE_START)
    }
    fn end(&self) -> Option<WordIndex> {
        self.index(crate::model::SENTENCE_END)
    }
    fn log10_probability(&self, history: &[WordIndex], word: WordIndex) -> f64 {
        let mut probabilities = Vec::with_capacity(self.models.len());
        self.component_probabilities(history, word, &mut probabilities);
        probabilities
            .iter()
            .zip(&self.weights)
            .map(|(probability, weight)| probability * weight)
            .sum::<f64>()
            .log10()
    }
}

/// The result of [`estimate_weights`].
#[derive(Clone, Debug)]
pub struct MixtureWeights {
    /// One weight per model, summing to one.
    pub weights: Vec<f64>,
    /// EM iterations run.
    pub iterations: usize,
    /// The tuning text's scores under the mixture with these weights.
    pub tuning: Perplexity,
}

/// Tuning tokens as (history, word) in mixture indices, OOVs as `<unk>`.
fn tuning_events(
    mixture: &Mixture<'_>,
    sentences: &[Vec<String>],
) -> Vec<(Vec<WordIndex>, WordIndex)> {
    let mut events = Vec::new();
    for sentence in sentences {
        let mut history: Vec<WordIndex> = mixture.start().into_iter().collect();
        for word in sentence
            .iter()
            .map(String::as_str)
            .chain([crate::model::SENTENCE_END])
        {
            if let Some(index) = mixture.index(word).or(mixture.unknown()) {
                events.push((history.clone(), index));
                history.push(index);
            }
        }
    }
    events
}

/// Estimates mixture weights by EM on tuning sentences, starting from equal weights, until the
/// log-likelihood improves by less than 1e-10 per token (at most 1000 iterations).
pub fn estimate_weights(
    models: &[ArpaModel],
    tuning: &[Vec<String>],
) -> Result<MixtureWeights, LmError> {
    let mut mixture = Mixture::new(models, &vec![1.0; models.len()])?;
    let events = tuning_events(&mixture, tuning);
    if events.is_empty() {
        return Err(LmError::Invalid(
            "mixing: expected a tuning text with words, found none".to_string(),
        ));
    }
    let mut table: Vec<Vec<f64>> = Vec::with_capacity(events.len());
    let mut buffer = Vec::new();
    for (history, word) in &events {
        mixture.component_probabilities(history, *word, &mut buffer);
        table.push(buffer.clone());
    }
    let mut weights = mixture.weights.clone();
    let mut previous = f64::NEG_INFINITY;
    let mut iterations = 0;
    while iterations < 1000 {
        iterations += 1;
        let mut expected = vec![0.0; weights.len()];
        let mut log_likelihood = 0.0;
        for row in &table {
            let total: f64 = row.iter().zip(&weights).map(|(p, weight)| p * weight).sum();
            if total <= 0.0 {
                continue;
            }
            log_likelihood += total.ln();
            for (component, (p, weight)) in row.iter().zip(&weights).enumerate() {
                expected[component] += p * weight / total;
            }
        }
        let sum: f64 = expected.iter().sum();
        weights = expected.iter().map(|value| value / sum).collect();
        if (log_likelihood - previous) / (events.len() as f64) < 1e-10 {
            break;
        }
        previous = log_likelihood;
    }
    mixture.weights = weights.clone();
    let tuning = crate::eval::evaluate_sentences(&mixture, tuning.iter().cloned());
    Ok(MixtureWeights {
        weights,
        iterations,
        tuning,
    })
}

/// Merges the mixture into one back-off model (see the module documentation). `tuning` adds the
/// n-grams of those sentences so that the merged model is exact on them.
pub fn merge(
    models: &[ArpaModel],
    weights: &[f64],
    tuning: &[Vec<String>],
) -> Result<ArpaModel, LmError> {
    let mixture = Mixture::new(models, weights)?;
    let order = models.iter().map(ArpaModel::order).max().unwrap_or(1);
    let mut ngrams: Vec<HashMap<Vec<u32>, f64>> = vec![HashMap::new(); order];
    let mut wanted: Vec<Vec<u32>> = Vec::new();
    let mut words = Vec::new();
    for model in models {
        // Mixture index of every word of this model.
        let to_mixture: Vec<u32> = model
            .vocabulary()
            .map(|word| mixture.index.get(word).copied().unwrap_or(0))
            .collect();
        for (position, &count) in model.ngram_counts().iter().enumerate() {
            for id in 0..count as u32 {
                model.ngram_words(position + 1, id, &mut words);
                wanted.push(
                    words
                        .iter()
                        .map(|&word| to_mixture[word as usize])
                        .collect(),
                );
            }
        }
    }
    for word in 0..mixture.words.len() as u32 {
        wanted.push(vec![word]);
    }
    for (history, word) in tuning_events(&mixture, tuning) {
        let keep = history.len().min(order - 1);
        let mut ngram: Vec<u32> = history[history.len() - keep..]
            .iter()
            .map(|word| word.0)
            .collect();
        ngram.push(word.0);
        // Every contiguous part, so that prefixes and suffixes are listed too.
        for start in 0..ngram.len() {
            for end in start + 1..=ngram.len() {
                wanted.push(ngram[start..end].to_vec());
            }
        }
    }
    let start = mixture.start().map(|index| index.0);
    let mut buffer = Vec::new();
    for ngram in wanted {
        let n = ngram.len();
        if ngrams[n - 1].contains_key(&ngram) {
            continue;
        }
        let probability = if n == 1 && Some(ngram[0]) == start {
            0.0
        } else {
            let history: Vec<WordIndex> =
                ngram[..n - 1].iter().map(|&word| WordIndex(word)).collect();
            mixture.component_probabilities(&history, WordIndex(ngram[n - 1]), &mut buffer);
            buffer
                .iter()
                .zip(&mixture.weights)
                .map(|(p, weight)| p * weight)
                .sum()
        };
        ngrams[n - 1].insert(ngram, probability);
    }
    ExplicitModel {
        words: mixture.words.clone(),
        ngrams,
    }
    .into_model()
}

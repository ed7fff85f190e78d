//! Bootstrap confidence intervals over utterances (Bisani & Ney, "Bootstrap estimates for
//! confidence intervals in ASR performance evaluation", ICASSP 2004).
//!
//! Utterances, not words, are resampled, because errors within an utterance are correlated
//! (one misrecognized word drags its neighbours along). Each resample draws as many utterances
//! as the test set has, with replacement, and computes the corpus-level rate Σ errors / Σ
//! reference words. The paired variant draws the same utterances for two systems, which is what
//! makes a small but consistent difference visible. The random generator is ChaCha8 seeded from
//! the user's seed, so a report is reproducible on every machine.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// How the bootstrap is run.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BootstrapOptions {
    /// Number of bootstrap resamples.
    pub resamples: usize,
    /// Seed of the random generator.
    pub seed: u64,
    /// Confidence level of the interval, e.g. 0.95.
    pub confidence: f64,
}

impl Default for BootstrapOptions {
    fn default() -> Self {
        // 1000 resamples is the figure Bisani & Ney use; a 95 % confidence level is common practice.
        BootstrapOptions {
            resamples: 1000,
            seed: 1,
            confidence: 0.95,
        }
    }
}

/// A two-sided percentile interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Interval {
    /// Lower bound.
    pub low: f64,
    /// Upper bound.
    pub high: f64,
}

impl Interval {
    /// Whether `value` lies within the bounds (inclusive).
    pub fn contains(&self, value: f64) -> bool {
        self.low <= value && value <= self.high
    }
}

/// Errors and reference words of one utterance: what the bootstrap resamples.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct UtteranceErrors {
    /// Substitutions + deletions + insertions.
    pub errors: u64,
    /// Reference words.
    pub ref_words: u64,
}

/// Result of a paired bootstrap of two systems on the same utterances.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PairedBootstrap {
    /// Share of resamples in which system 2 has the lower error rate (Bisani & Ney's
    /// "probability of improvement").
    pub probability_system2_better: f64,
    /// Interval of the difference rate(system 2) − rate(system 1); below zero means system 2
    /// makes fewer errors.
    pub difference_interval: Interval,
    /// Replicates that had reference words (a resample of only empty references has no rate
    /// and is left out).
    pub valid_resamples: usize,
}

fn rate(errors: u64, ref_words: u64) -> Option<f64> {
    (ref_words > 0).then(|| errors as f64 / ref_words as f64)
}

/// The `q`-quantile of sorted values by linear interpolation between order statistics (the
/// default method of numpy's `percentile`).
fn quantile(sorted: &[f64], q: f64) -> f64 {
    let position = q * (sorted.len() - 1) as f64;
    let below = position.floor() as usize;
    let above = position.ceil() as usize;
    let fraction = position - below as f64;
    sorted[below] + (sorted[above] - sorted[below]) * fraction
}

fn percentile_interval(mut values: Vec<f64>, confidence: f64) -> Option<Interval> {
    if values.is_empty() {
        return None;
    }
    values.sort_by(f64::total_cmp);
    let tail = (1.0 - confidence) / 2.0;
    Some(Interval {
        low: quantile(&values, tail),
        high: quantile(&values, 1.0 - tail),
    })
}

/// Draws the utterance indices of every resample and hands each resample to `visit`.
fn for_each_resample(count: usize, options: &BootstrapOptions, mut visit: impl FnMut(&[usize])) {
    if count == 0 {
        return;
    }
    let mut rng = ChaCha8Rng::seed_from_u64(options.seed);
    let mut indices = vec![0usize; count];
    for _ in 0..options.resamples {
        for index in indices.iter_mut() {
            *index = rng.random_range(0..count);
        }
        visit(&indices);
    }
}

/// Percentile bootstrap interval of the corpus error rate; `None` when no resample has
/// reference words (e.g. no utterances at all).
pub fn interval(utterances: &[UtteranceErrors], options: &BootstrapOptions) -> Option<Interval> {
    let mut rates = Vec::with_capacity(options.resamples);
    for_each_resample(utterances.len(), options, |indices| {
        let (errors, words) = indices.iter().fold((0, 0), |(e, w), &i| {
            (e + utterances[i].errors, w + utterances[i].ref_words)
        });
        rates.extend(rate(errors, words));
    });
    percentile_interval(rates, options.confidence)
}

/// Paired bootstrap of two systems scored on the same utterances (same order, same reference
/// words). `None` when the lists are empty or of different lengths, or no resample has
/// reference words.
pub fn paired(
    system1: &[UtteranceErrors],
    system2: &[UtteranceErrors],
    options: &BootstrapOptions,
) -> Option<PairedBootstrap> {
    if system1.len() != system2.len() {
        return None;
    }
    let mut differences = Vec::with_capacity(options.resamples);
    let mut better = 0usize;
    for_each_resample(system1.len(), options, |indices| {
        let (mut errors1, mut errors2, mut words) = (0, 0, 0);
        for &i in indices {
            errors1 += system1[i].errors;
            errors2 += system2[i].errors;
            words += system1[i].ref_words;
        }
        if let (Some(rate1), Some(rate2)) = (rate(errors1, words), rate(errors2, words)) {
            differences.push(rate2 - rate1);
            if rate2 < rate1 {
                better += 1;
            }
        }
    });
    let valid_resamples = differences.len();
    let difference_interval = percentile_interval(differences, options.confidence)?;
    Some(PairedBootstrap {
        probability_system2_better: better as f64 / valid_resamples as f64,
        difference_interval,
        valid_resamples,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A test set of 60 utterances with varied lengths and error counts (invented).
    fn test_set(shift: u64) -> Vec<UtteranceErrors> {
        (0..60u64)
            .map(|i| UtteranceErrors {
                errors: (i * 7 + shift) % 5,
                ref_words: 4 + (i * 3) % 9,
            })
            .collect()
    }

    fn corpus_rate(set: &[UtteranceErrors]) -> f64 {
        let errors: u64 = set.iter().map(|u| u.errors).sum();
        let words: u64 = set.iter().map(|u| u.ref_words).sum();
        errors as f64 / words as f64
    }

    #[test]
    fn interval_contains_the_point_estimate_and_is_reproducible() {
        let set = test_set(0);
        let options = BootstrapOptions::default();
        let found = interval(&set, &options).unwrap();
        assert!(found.contains(corpus_rate(&set)), "{found:?}");
        assert!(found.low < found.high);
        assert_eq!(interval(&set, &options), Some(found));
        let other_seed = interval(&set, &BootstrapOptions { seed: 2, ..options }).unwrap();
        assert_ne!(other_seed, found);
    }

    #[test]
    fn a_higher_confidence_gives_a_wider_interval() {
        let set = test_set(0);
        let narrow = interval(
            &set,
            &BootstrapOptions {
                confidence: 0.5,
                ..Default::default()
            },
        );
        let wide = interval(
            &set,
            &BootstrapOptions {
                confidence: 0.99,
                ..Default::default()
            },
        );
        let (narrow, wide) = (narrow.unwrap(), wide.unwrap());
        assert!(wide.low <= narrow.low && narrow.high <= wide.high);
    }

    #[test]
    fn quantile_interpolates_like_numpy() {
        assert!((quantile(&[1.0, 2.0, 3.0, 4.0], 0.25) - 1.75).abs() < 1e-12); // numpy.percentile([1, 2, 3, 4], 25), computed with the project venv's numpy
        assert!((quantile(&[1.0, 2.0, 3.0, 4.0], 0.9) - 3.7).abs() < 1e-12); // numpy.percentile([1, 2, 3, 4], 90), same
    }

    #[test]
    fn paired_bootstrap_sees_a_consistently_better_system() {
        let system1 = test_set(0);
        let system2: Vec<UtteranceErrors> = system1
            .iter()
            .map(|u| UtteranceErrors {
                errors: u.errors.saturating_sub(1),
                ..*u
            })
            .collect();
        let result = paired(&system1, &system2, &BootstrapOptions::default()).unwrap();
        assert!(result.probability_system2_better > 0.99, "{result:?}");
        assert!(result.difference_interval.high < 0.0);
        let point = corpus_rate(&system2) - corpus_rate(&system1);
        assert!(result.difference_interval.contains(point));
        let reversed = paired(&system2, &system1, &BootstrapOptions::default()).unwrap();
        assert!(reversed.probability_system2_better < 0.01);
    }

    #[test]
    fn identical_systems_are_never_better() {
        let set = test_set(3);
        let result = paired(&set, &set, &BootstrapOptions::default()).unwrap();
        assert_eq!(result.probability_system2_better, 0.0);
        assert_eq!(
            result.difference_interval,
            Interval {
                low: 0.0,
                high: 0.0
            }
        );
    }

    #[test]
    fn empty_or_wordless_sets_have_no_interval() {
        let options = BootstrapOptions::default();
        assert_eq!(interval(&[], &options), None);
        let wordless = [UtteranceErrors {
            errors: 2,
            ref_words: 0,
        }];
        assert_eq!(interval(&wordless, &options), None);
        assert_eq!(paired(&wordless, &wordless[..0], &options), None);
    }
}

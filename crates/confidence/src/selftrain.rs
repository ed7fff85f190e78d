//! Self-training: which machine transcripts of untranscribed segments are safe to train on.
//!
//! A round of self-training transcribes dev and the untranscribed pool with the current model,
//! chooses a threshold on the *segment confidence* (the mean word certainty,
//! [`crate::segment_confidence`], uncalibrated: a monotone calibration would not change which
//! segments pass) and keeps the pool's segments at or above it as pseudo-labels.
//!
//! The threshold comes from one of two rules ([`ThresholdRule`]):
//!
//! - **dev WER target** (the default): dev segments are sorted by confidence; for every distinct
//!   confidence `t` of a dev segment, the segments at or above `t` are "kept", and their pooled
//!   WER (errors over reference words, as scoring counts them) is computed. The threshold is the
//!   *lowest* `t` whose kept dev segments have a WER of at most the target: the most data whose
//!   transcripts, judged on dev, are as good as asked. The kept WER is not monotone in `t`, so
//!   every `t` is tried. When no `t` meets the target, nothing is kept.
//! - **fixed**: a threshold given by the user.
//!
//! A segment without words has no confidence and is never kept. A threshold that keeps nothing
//! is an outcome ([`Selection::note`]), not an error: the caller reports it and goes on.

use isogloss_decoder::output::TimedWord;
use isogloss_score::{align, tokenize, TokenRules, VariantMap};
use serde::Serialize;

use crate::calibration::{segment_confidence, Calibration};

/// A dev segment as the threshold rule sees it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DevSegment {
    /// Mean word certainty; `None` when nothing was recognized.
    pub confidence: Option<f64>,
    /// Word errors of the hypothesis against the reference (substitutions, deletions,
    /// insertions).
    pub errors: u64,
    /// Words of the reference.
    pub reference_words: u64,
}

impl DevSegment {
    /// A dev segment from its reference transcript and its hypothesis words, tokenized and
    /// aligned as scoring does (exact spelling: no variant map).
    pub fn new(reference: &str, words: &[TimedWord], rules: &TokenRules) -> DevSegment {
        let reference = tokenize(reference, rules);
        let hypothesis: Vec<String> = words
            .iter()
            .flat_map(|w| tokenize(&w.word, rules))
            .collect();
        let counts = align(&reference, &hypothesis, &VariantMap::default()).counts();
        DevSegment {
            confidence: segment_confidence(
                words.iter().map(|w| w.confidence),
                &Calibration::IDENTITY,
            ),
            errors: counts.errors(),
            reference_words: reference.len() as u64,
        }
    }
}

/// How the confidence threshold is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ThresholdRule {
    /// The lowest threshold at which the kept dev segments' WER is at most this (a share,
    /// 0.1 = 10 %).
    DevWer(f64),
    /// This threshold, whatever dev says.
    Fixed(f64),
}

/// The default WER target of the dev rule: kept pseudo-labels about as good as a well-trained
/// demo model's output (a choice, not a measured optimum).
pub const DEFAULT_TARGET_WER: f64 = 0.10;

impl ThresholdRule {
    /// The rule in words, for logs and `model.toml`.
    pub fn describe(&self) -> String {
        match self {
            ThresholdRule::DevWer(target) => format!(
                "lowest segment confidence at which the kept dev segments' WER is at most {:.1} %",
                100.0 * target
            ),
            ThresholdRule::Fixed(threshold) => format!("fixed threshold {threshold}"),
        }
    }
}

/// The threshold a rule chose, with what it keeps of dev.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ThresholdChoice {
    /// The rule in words.
    pub rule: String,
    /// Keep segments whose confidence is at least this; `None`: keep nothing.
    pub threshold: Option<f64>,
    /// Dev segments considered.
    pub dev_segments: usize,
    /// Dev segments at or above the threshold.
    pub dev_kept: usize,
    /// Pooled WER of those (`None` when none are kept or they have no reference words).
    pub dev_kept_wer: Option<f64>,
    /// Pooled WER of all dev segments (`None` without reference words).
    pub dev_wer: Option<f64>,
}

/// Pooled WER of dev segments: all their errors over all their reference words (`None`
/// without reference words).
pub fn pooled_wer<'a>(segments: impl IntoIterator<Item = &'a DevSegment>) -> Option<f64> {
    let (mut errors, mut words) = (0u64, 0u64);
    for s in segments {
        errors += s.errors;
        words += s.reference_words;
    }
    (words > 0).then(|| errors as f64 / words as f64)
}

/// Chooses the threshold by `rule` from the dev segments (see the module documentation).
pub fn choose_threshold(dev: &[DevSegment], rule: &ThresholdRule) -> ThresholdChoice {
    let kept_at = |t: f64| {
        dev.iter()
            .filter(move |s| s.confidence.is_some_and(|c| c >= t))
    };
    let threshold = match *rule {
        ThresholdRule::Fixed(t) => Some(t),
        ThresholdRule::DevWer(target) => {
            let mut levels: Vec<f64> = dev.iter().filter_map(|s| s.confidence).collect();
            levels.sort_by(|a, b| a.total_cmp(b));
            levels.dedup();
            // ascending: the first level that meets the target is the lowest
            levels
                .into_iter()
                .find(|&t| pooled_wer(kept_at(t)).is_some_and(|wer| wer <= target))
        }
    };
    let (dev_kept, dev_kept_wer) = match threshold {
        Some(t) => (kept_at(t).count(), pooled_wer(kept_at(t))),
        None => (0, None),
    };
    ThresholdChoice {
        rule: rule.describe(),
        threshold,
        dev_segments: dev.len(),
        dev_kept,
        dev_kept_wer,
        dev_wer: pooled_wer(dev),
    }
}

/// An untranscribed segment with its machine transcript's confidence.
#[derive(Debug, Clone, PartialEq)]
pub struct PseudoCandidate {
    /// Segment id.
    pub id: String,
    /// Length, seconds.
    pub seconds: f64,
    /// Mean word certainty ([`crate::segment_confidence`] without calibration); `None` when
    /// nothing was recognized.
    pub confidence: Option<f64>,
}

impl PseudoCandidate {
    /// A candidate from its hypothesis words.
    pub fn new(id: impl Into<String>, seconds: f64, words: &[TimedWord]) -> PseudoCandidate {
        PseudoCandidate {
            id: id.into(),
            seconds,
            confidence: segment_confidence(
                words.iter().map(|w| w.confidence),
                &Calibration::IDENTITY,
            ),
        }
    }
}

/// The candidates a threshold keeps.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Selection {
    /// The threshold applied (`None`: keep nothing).
    pub threshold: Option<f64>,
    /// Candidates offered.
    pub offered: usize,
    /// Their audio, seconds.
    pub offered_seconds: f64,
    /// Indices of the kept candidates, in input order.
    pub kept: Vec<usize>,
    /// Their audio, seconds.
    pub kept_seconds: f64,
    /// Candidates in which nothing was recognized (never kept).
    pub without_words: usize,
}

impl Selection {
    /// Why nothing was kept, when nothing was (for the log and the user).
    pub fn note(&self) -> Option<String> {
        if !self.kept.is_empty() {
            return None;
        }
        Some(match self.threshold {
            _ if self.offered == 0 => "no untranscribed segment to choose from".to_string(),
            None => "no confidence threshold meets the rule on dev: no segment kept".to_string(),
            Some(t) => format!(
                "no untranscribed segment reaches the confidence threshold {t:.4}: none kept"
            ),
        })
    }
}

/// Keeps the candidates whose confidence is at least `threshold` (none when it is `None`).
pub fn select(candidates: &[PseudoCandidate], threshold: Option<f64>) -> Selection {
    let kept: Vec<usize> = candidates
        .iter()
        .enumerate()
        .filter(|(_, c)| matches!((c.confidence, threshold), (Some(c), Some(t)) if c >= t))
        .map(|(i, _)| i)
        .collect();
    Selection {
        threshold,
        offered: candidates.len(),
        offered_seconds: candidates.iter().map(|c| c.seconds).fold(0.0, |a, b| a + b),
        kept_seconds: kept
            .iter()
            .map(|&i| candidates[i].seconds)
            .fold(0.0, |a, b| a + b),
        kept,
        without_words: candidates.iter().filter(|c| c.confidence.is_none()).count(),
    }
}

/// Where the pool's segment confidences sit against dev's. The dev rule assumes that a pool
/// segment of a given confidence is as good as a dev segment of that confidence; on audio unlike
/// dev (another channel, room or kind of voice) that fails: on the demo, a rule met at 12 % WER
/// on dev kept a pool of new channels whose pseudo-labels had 28 % (README, "Self-training").
/// Its sign was there in the confidences: the pool's median below dev's lower quartile.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PoolAgainstDev {
    /// Median segment confidence of dev.
    pub dev_median: f64,
    /// Lower quartile of dev's segment confidences.
    pub dev_lower_quartile: f64,
    /// Median segment confidence of the pool.
    pub pool_median: f64,
}

impl PoolAgainstDev {
    /// The pool's median confidence is below dev's lower quartile.
    pub fn unlike_dev(&self) -> bool {
        self.pool_median < self.dev_lower_quartile
    }

    /// The warning for the log and the round's record, when the pool is unlike dev.
    pub fn warning(&self) -> Option<String> {
        self.unlike_dev().then(|| {
            format!(
                "the pool's median confidence {:.3} is below dev's lower quartile {:.3}: the pool \
                 does not sound like dev, so the kept segments' WER may be well above what the \
                 rule found on dev; check a transcribed sample of the pool, or fix the threshold \
                 with --pseudo-threshold",
                self.pool_median, self.dev_lower_quartile
            )
        })
    }
}

/// Dev's and the pool's confidences compared (segments in which nothing was recognized left
/// out); `None` when either has none.
pub fn pool_against_dev(dev: &[DevSegment], pool: &[PseudoCandidate]) -> Option<PoolAgainstDev> {
    let sorted = |values: Vec<f64>| {
        let mut values = values;
        values.sort_by(f64::total_cmp);
        values
    };
    let dev = sorted(dev.iter().filter_map(|s| s.confidence).collect());
    let pool = sorted(pool.iter().filter_map(|c| c.confidence).collect());
    Some(PoolAgainstDev {
        dev_median: quantile(&dev, 0.5)?,
        dev_lower_quartile: quantile(&dev, 0.25)?,
        pool_median: quantile(&pool, 0.5)?,
    })
}

/// The `q` quantile of sorted values, interpolating linearly between the two nearest ranks
/// (position `(n − 1) q`; Hyndman and Fan's definition 7, numpy's default).
fn quantile(sorted: &[f64], q: f64) -> Option<f64> {
    let last = sorted.len().checked_sub(1)?;
    let position = last as f64 * q;
    let below = position.floor() as usize;
    let above = (below + 1).min(last);
    Some(sorted[below] + (position - below as f64) * (sorted[above] - sorted[below]))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dev(confidence: f64, errors: u64, words: u64) -> DevSegment {
        DevSegment {
            confidence: Some(confidence),
            errors,
            reference_words: words,
        }
    }

    fn word(text: &str, confidence: f32) -> TimedWord {
        TimedWord {
            word: text.into(),
            start: 0.0,
            end: 0.1,
            confidence,
        }
    }

    #[test]
    fn the_dev_rule_takes_the_lowest_threshold_that_meets_the_target() {
        // By hand: at 0.9 kept {0.95: 0/10, 0.9: 1/10} → 5 %; at 0.8 add 2/10 → 10 %;
        // at 0.5 add 8/10 → 27.5 %.
        let segments = [
            dev(0.95, 0, 10),
            dev(0.9, 1, 10),
            dev(0.8, 2, 10),
            dev(0.5, 8, 10),
        ];
        let choice = choose_threshold(&segments, &ThresholdRule::DevWer(0.10));
        assert_eq!(choice.threshold, Some(0.8));
        assert_eq!(choice.dev_kept, 3);
        assert!((choice.dev_kept_wer.unwrap() - 0.1).abs() < 1e-12);
        assert!((choice.dev_wer.unwrap() - 11.0 / 40.0).abs() < 1e-12);
        let strict = choose_threshold(&segments, &ThresholdRule::DevWer(0.05));
        assert_eq!(strict.threshold, Some(0.9));
        let loose = choose_threshold(&segments, &ThresholdRule::DevWer(0.5));
        assert_eq!(loose.threshold, Some(0.5));
        assert_eq!(loose.dev_kept, 4);
    }

    #[test]
    fn the_dev_rule_tries_every_level_because_the_kept_wer_is_not_monotone() {
        // At 0.9 the one kept segment is all wrong (100 %); at 0.8 it is diluted to 1/11.
        let segments = [dev(0.9, 1, 1), dev(0.8, 0, 10)];
        let choice = choose_threshold(&segments, &ThresholdRule::DevWer(0.10));
        assert_eq!(choice.threshold, Some(0.8));
        assert_eq!(choice.dev_kept, 2);
    }

    #[test]
    fn a_target_no_level_meets_keeps_nothing_and_says_so() {
        let segments = [dev(0.9, 3, 10), dev(0.4, 9, 10)];
        let choice = choose_threshold(&segments, &ThresholdRule::DevWer(0.05));
        assert_eq!(choice.threshold, None);
        assert_eq!((choice.dev_kept, choice.dev_kept_wer), (0, None));
        let pool = [PseudoCandidate {
            id: "a".into(),
            seconds: 2.0,
            confidence: Some(0.99),
        }];
        let selection = select(&pool, choice.threshold);
        assert!(selection.kept.is_empty());
        assert_eq!(selection.kept_seconds, 0.0);
        assert!(selection
            .note()
            .unwrap()
            .contains("no confidence threshold"));
    }

    #[test]
    fn segments_without_words_are_never_kept_nor_make_a_threshold() {
        let segments = [
            DevSegment {
                confidence: None,
                errors: 5,
                reference_words: 5,
            },
            dev(0.7, 0, 5),
        ];
        let choice = choose_threshold(&segments, &ThresholdRule::DevWer(0.0));
        assert_eq!(choice.threshold, Some(0.7));
        assert_eq!(choice.dev_kept, 1);
        let pool = vec![
            PseudoCandidate::new("silent", 3.0, &[]),
            PseudoCandidate::new("spoken", 2.0, &[word("hoose", 0.8), word("doon", 0.7)]),
        ];
        let selection = select(&pool, Some(0.0));
        assert_eq!(selection.kept, vec![1]);
        assert_eq!(selection.without_words, 1);
        assert_eq!(selection.offered_seconds, 5.0);
        assert_eq!(selection.kept_seconds, 2.0);
        assert!(selection.note().is_none());
    }

    #[test]
    fn an_all_low_confidence_pool_keeps_nothing_and_the_note_names_the_threshold() {
        let pool: Vec<PseudoCandidate> = (0..5)
            .map(|i| PseudoCandidate::new(format!("u{i}"), 1.5, &[word("owd", 0.2)]))
            .collect();
        let selection = select(&pool, Some(0.6));
        assert!(selection.kept.is_empty());
        assert_eq!(selection.offered, 5);
        assert_eq!(selection.without_words, 0);
        let note = selection.note().unwrap();
        assert!(note.contains("0.6000"), "{note}");
        // the threshold is inclusive: a segment exactly at it is kept
        let at = select(&pool, Some(f64::from(0.2f32)));
        assert_eq!(at.kept.len(), 5);
    }

    #[test]
    fn a_fixed_threshold_is_taken_as_given_and_dev_is_described_under_it() {
        let segments = [dev(0.95, 0, 10), dev(0.5, 5, 10)];
        let choice = choose_threshold(&segments, &ThresholdRule::Fixed(0.9));
        assert_eq!(choice.threshold, Some(0.9));
        assert_eq!(choice.dev_kept, 1);
        assert_eq!(choice.dev_kept_wer, Some(0.0));
        assert!(choice.rule.contains("fixed"));
    }

    #[test]
    fn quantiles_interpolate_between_ranks_as_numpy_does() {
        // numpy's np.quantile (default method "linear"), written by
        // scripts/reference/quantile_reference.py
        let text = include_str!("../../../tests/fixtures/confidence/numpy_quantiles.json");
        let fixture: serde_json::Value = serde_json::from_str(text).unwrap();
        let cases = fixture["cases"].as_array().unwrap();
        assert_eq!(cases.len(), 4);
        for case in cases {
            let mut x: Vec<f64> = case["x"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().unwrap())
                .collect();
            x.sort_by(f64::total_cmp);
            for (q, key) in [(0.25, "q25"), (0.5, "q50")] {
                let expected = case[key].as_f64().unwrap();
                let got = quantile(&x, q).unwrap();
                assert!(
                    (got - expected).abs() < 1e-12,
                    "n = {}, q = {q}: {got} against {expected}",
                    x.len()
                );
            }
        }
        assert_eq!(quantile(&[], 0.5), None);
    }

    #[test]
    fn a_pool_whose_median_confidence_is_below_devs_lower_quartile_is_unlike_dev() {
        let dev: Vec<DevSegment> = [0.99, 0.97, 0.95, 0.93, 0.91]
            .iter()
            .map(|&c| dev(c, 0, 5))
            .chain([DevSegment {
                confidence: None,
                errors: 3,
                reference_words: 3,
            }])
            .collect();
        let pool = |confidences: &[f64]| -> Vec<PseudoCandidate> {
            confidences
                .iter()
                .enumerate()
                .map(|(i, &c)| PseudoCandidate {
                    id: format!("p{i}"),
                    seconds: 1.0,
                    confidence: Some(c),
                })
                .chain([PseudoCandidate {
                    id: "empty".into(),
                    seconds: 1.0,
                    confidence: None,
                }])
                .collect()
        };
        // dev: lower quartile 0.93, median 0.95
        let like = pool_against_dev(&dev, &pool(&[0.96, 0.94, 0.90])).unwrap();
        assert!((like.dev_lower_quartile - 0.93).abs() < 1e-12);
        assert!((like.dev_median - 0.95).abs() < 1e-12);
        assert!((like.pool_median - 0.94).abs() < 1e-12);
        assert!(!like.unlike_dev() && like.warning().is_none());
        let unlike = pool_against_dev(&dev, &pool(&[0.96, 0.92, 0.80])).unwrap();
        assert!((unlike.pool_median - 0.92).abs() < 1e-12);
        assert!(unlike.unlike_dev());
        let warning = unlike.warning().unwrap();
        assert!(
            warning.contains("0.920") && warning.contains("0.930"),
            "{warning}"
        );
        assert_eq!(pool_against_dev(&dev, &pool(&[])), None);
    }

    #[test]
    fn dev_segments_are_scored_as_scoring_counts() {
        // reference 4 words, hypothesis one substitution and one insertion: 2 errors
        let words = [
            word("we", 0.9),
            word("had", 0.9),
            word("twa", 0.5),
            word("hens", 0.9),
            word("an", 0.3),
        ];
        let segment = DevSegment::new("we had two hens", &words, &TokenRules::default());
        assert_eq!((segment.errors, segment.reference_words), (2, 4));
        let mean = (0.9f32 as f64 * 3.0 + 0.5f32 as f64 + 0.3f32 as f64) / 5.0;
        assert!((segment.confidence.unwrap() - mean).abs() < 1e-12);
    }
}

//! What to transcribe next: untranscribed segments ranked for human transcription within a
//! budget of audio time.
//!
//! A segment's priority adds four parts, each in [0, 1] and weighted ([`RankWeights`]):
//!
//! - **expected errors**: `1 − ` its segment confidence (the mean calibrated word confidence,
//!   [`crate::segment_confidence`]); a segment in which nothing was recognized counts 1;
//! - **unknown words**: the share of its hypothesis words that the training transcripts never
//!   use (only telling when decoding can produce words outside them: no lexicon, or a lexicon
//!   larger than the training text);
//! - **dialect rarity** and **speaker rarity**: `m / (m + n)`, where `n` counts the training rows
//!   of the segment's dialect (speaker) *plus the segments already chosen*, and `m` is the mean
//!   rows per dialect (speaker) of the training manifest. A dialect the training manifest lacks
//!   scores 1, an average one ½; a segment without a label scores ½.
//!
//! Choosing is greedy by priority, and because rarity counts what was already chosen, every
//! choice lowers the priority of the remaining segments of the same dialect and speaker: the
//! budget spreads over voices instead of going to one hard recording. Priorities only ever
//! fall, so a max-heap with lazy re-evaluation gives exactly the greedy order in
//! O(n log n). A segment longer than the budget left is passed over, and smaller ones after it
//! may still fit.

use std::cmp::Ordering;
use std::collections::{BinaryHeap, HashMap, HashSet};

use isogloss_corpus::Manifest;
use isogloss_score::{tokenize, TokenRules};
use serde::Serialize;

use crate::calibration::{segment_confidence, Calibration};
use crate::ConfidenceError;

/// An untranscribed segment with its machine transcript.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    /// Segment id (a manifest id, or recording id and stretch number).
    pub id: String,
    /// Start, seconds from the start of the audio file.
    pub start: f64,
    /// End, seconds.
    pub end: f64,
    /// Speaker label; empty when unknown.
    pub speaker: String,
    /// Dialect label; empty when unknown.
    pub dialect: String,
    /// The hypothesis words.
    pub words: Vec<String>,
    /// The decoder's certainty of each word.
    pub certainties: Vec<f32>,
}

impl Candidate {
    fn seconds(&self) -> f64 {
        self.end - self.start
    }

    fn check(&self) -> Result<(), ConfidenceError> {
        let problem = if !(self.start.is_finite() && self.end.is_finite()) || self.start < 0.0 {
            Some(format!(
                "expected finite times from 0 on, found {} to {}",
                self.start, self.end
            ))
        } else if self.end <= self.start {
            Some(format!(
                "expected an end after the start, found {} to {}",
                self.start, self.end
            ))
        } else if self.words.len() != self.certainties.len() {
            Some(format!(
                "expected one certainty per word, found {} words and {} certainties",
                self.words.len(),
                self.certainties.len()
            ))
        } else {
            None
        };
        match problem {
            Some(problem) => Err(ConfidenceError::BadSegment {
                id: self.id.clone(),
                problem,
            }),
            None => Ok(()),
        }
    }
}

/// What the training manifest already holds: rows per dialect and speaker, and its words.
#[derive(Debug, Clone, Default)]
pub struct TrainingProfile {
    /// Training rows per dialect label (empty labels left out).
    pub dialect_rows: HashMap<String, usize>,
    /// Training rows per speaker label (empty labels left out).
    pub speaker_rows: HashMap<String, usize>,
    /// Scoring tokens of the training transcripts; empty when no writing was given, and then no
    /// word counts as unknown.
    pub vocabulary: HashSet<String>,
}

impl TrainingProfile {
    /// The profile of a training manifest; `column` names the writing whose words count as
    /// known (`None`: no word is unknown).
    pub fn from_manifest(
        manifest: &Manifest,
        column: Option<&str>,
    ) -> Result<TrainingProfile, ConfidenceError> {
        let column = column.map(|c| manifest.column_index(c)).transpose()?;
        let rules = TokenRules::default();
        let mut profile = TrainingProfile::default();
        for utterance in &manifest.utterances {
            if !utterance.dialect.is_empty() {
                *profile
                    .dialect_rows
                    .entry(utterance.dialect.clone())
                    .or_default() += 1;
            }
            if !utterance.speaker.is_empty() {
                *profile
                    .speaker_rows
                    .entry(utterance.speaker.clone())
                    .or_default() += 1;
            }
            if let Some(c) = column {
                profile
                    .vocabulary
                    .extend(tokenize(&utterance.transcripts[c], &rules));
            }
        }
        Ok(profile)
    }
}

/// Weights of the parts of a segment's priority.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct RankWeights {
    /// Weight of the expected share of wrong words.
    pub errors: f64,
    /// Weight of the share of words unknown to the training transcripts.
    pub unknown_words: f64,
    /// Weight of the dialect's rarity.
    pub dialect: f64,
    /// Weight of the speaker's rarity.
    pub speaker: f64,
}

impl Default for RankWeights {
    /// Expected errors lead; unknown words count half as much; dialect and speaker rarity a
    /// quarter each, enough to break near-ties and spread the budget, not to override a
    /// transcript that is clearly worse.
    fn default() -> Self {
        RankWeights {
            errors: 1.0,
            unknown_words: 0.5,
            dialect: 0.25,
            speaker: 0.25,
        }
    }
}

/// A chosen segment, in the order chosen.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Ranked {
    /// Index into the candidates.
    pub index: usize,
    /// The priority when it was chosen.
    pub priority: f64,
    /// Mean calibrated word confidence (`None`: nothing recognized).
    pub confidence: Option<f64>,
    /// Share of hypothesis words unknown to the training transcripts.
    pub unknown_share: f64,
    /// Dialect rarity when chosen.
    pub dialect_rarity: f64,
    /// Speaker rarity when chosen.
    pub speaker_rarity: f64,
    /// Seconds of audio chosen up to and including this segment.
    pub cumulative_seconds: f64,
}

/// The result of [`shortlist`].
#[derive(Debug, Default)]
pub struct Shortlist {
    /// Chosen segments in the order chosen (highest priority first).
    pub chosen: Vec<Ranked>,
    /// Candidates left out because they are not usable (named, with the problem).
    pub skipped: Vec<ConfidenceError>,
    /// Seconds of audio in all usable candidates.
    pub pool_seconds: f64,
}

/// `m / (m + n)`: the rarity of a label with `n` rows when the mean is `m`; ½ for no label.
struct Rarity<'a> {
    rows: HashMap<&'a str, f64>,
    mean: f64,
}

impl<'a> Rarity<'a> {
    fn new(training: &'a HashMap<String, usize>) -> Self {
        let mean = if training.is_empty() {
            1.0
        } else {
            training.values().sum::<usize>() as f64 / training.len() as f64
        };
        Rarity {
            rows: training
                .iter()
                .map(|(k, &v)| (k.as_str(), v as f64))
                .collect(),
            mean,
        }
    }

    fn of(&self, label: &str) -> f64 {
        if label.is_empty() {
            return 0.5;
        }
        let n = self.rows.get(label).copied().unwrap_or(0.0);
        self.mean / (self.mean + n)
    }

    fn add(&mut self, label: &'a str) {
        if !label.is_empty() {
            *self.rows.entry(label).or_insert(0.0) += 1.0;
        }
    }
}

#[derive(PartialEq)]
struct Entry {
    priority: f64,
    index: usize,
}

impl Eq for Entry {}

impl PartialOrd for Entry {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Entry {
    /// Higher priority first; among equals, the earlier candidate (a stable order).
    fn cmp(&self, other: &Self) -> Ordering {
        self.priority
            .total_cmp(&other.priority)
            .then(other.index.cmp(&self.index))
    }
}

/// Chooses segments for human transcription, highest priority first, until `budget_seconds`
/// of audio are taken (see the module docs for the priority). Unusable candidates are listed
/// in [`Shortlist::skipped`], not fatal.
pub fn shortlist(
    candidates: &[Candidate],
    profile: &TrainingProfile,
    temperature: &Calibration,
    weights: &RankWeights,
    budget_seconds: f64,
) -> Shortlist {
    let rules = TokenRules::default();
    let mut result = Shortlist::default();
    let mut fixed = vec![(None, 0.0); candidates.len()];
    let mut heap = BinaryHeap::new();
    let mut dialects = Rarity::new(&profile.dialect_rows);
    let mut speakers = Rarity::new(&profile.speaker_rows);
    let priority = |fixed: &(Option<f64>, f64), c: &Candidate, d: &Rarity, s: &Rarity| {
        weights.errors * (1.0 - fixed.0.unwrap_or(0.0))
            + weights.unknown_words * fixed.1
            + weights.dialect * d.of(&c.dialect)
            + weights.speaker * s.of(&c.speaker)
    };
    for (index, candidate) in candidates.iter().enumerate() {
        if let Err(error) = candidate.check() {
            result.skipped.push(error);
            continue;
        }
        result.pool_seconds += candidate.seconds();
        let confidence = segment_confidence(candidate.certainties.iter().copied(), temperature);
        let tokens: Vec<String> = candidate
            .words
            .iter()
            .flat_map(|w| tokenize(w, &rules))
            .collect();
        let unknown = if profile.vocabulary.is_empty() || tokens.is_empty() {
            0.0
        } else {
            tokens
                .iter()
                .filter(|t| !profile.vocabulary.contains(*t))
                .count() as f64
                / tokens.len() as f64
        };
        fixed[index] = (confidence, unknown);
        heap.push(Entry {
            priority: priority(&fixed[index], candidate, &dialects, &speakers),
            index,
        });
    }
    let mut used = 0.0;
    while let Some(top) = heap.pop() {
        let candidate = &candidates[top.index];
        let now = priority(&fixed[top.index], candidate, &dialects, &speakers);
        // Stored priorities are upper bounds (they only fall), so the recomputed one is the
        // greatest when it still beats the next stored one; otherwise it goes back in.
        let fresh = Entry {
            priority: now,
            index: top.index,
        };
        if heap.peek().is_some_and(|next| fresh < *next) {
            heap.push(fresh);
            continue;
        }
        if used + candidate.seconds() > budget_seconds {
            continue;
        }
        used += candidate.seconds();
        result.chosen.push(Ranked {
            index: top.index,
            priority: now,
            confidence: fixed[top.index].0,
            unknown_share: fixed[top.index].1,
            dialect_rarity: dialects.of(&candidate.dialect),
            speaker_rarity: speakers.of(&candidate.speaker),
            cumulative_seconds: used,
        });
        dialects.add(&candidate.dialect);
        speakers.add(&candidate.speaker);
    }
    result
}

/// Spearman's rank correlation of two equally long sequences: the Pearson correlation of their
/// ranks, tied values sharing their mean rank. `None` with fewer than two pairs or when either
/// side is constant.
pub fn rank_correlation(x: &[f64], y: &[f64]) -> Option<f64> {
    if x.len() != y.len() || x.len() < 2 {
        return None;
    }
    let (rx, ry) = (ranks(x), ranks(y));
    let n = x.len() as f64;
    let (mx, my) = (rx.iter().sum::<f64>() / n, ry.iter().sum::<f64>() / n);
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (a, b) in rx.iter().zip(&ry) {
        sxy += (a - mx) * (b - my);
        sxx += (a - mx) * (a - mx);
        syy += (b - my) * (b - my);
    }
    (sxx > 0.0 && syy > 0.0).then(|| sxy / (sxx * syy).sqrt())
}

/// 1-based ranks, ties sharing their mean rank.
fn ranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; values.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && values[order[j + 1]] == values[order[i]] {
            j += 1;
        }
        let mean = (i + j) as f64 / 2.0 + 1.0;
        for &k in &order[i..=j] {
            ranks[k] = mean;
        }
        i = j + 1;
    }
    ranks
}

#[cfg(test)]
mod tests {
    use super::*;

    fn candidate(
        id: &str,
        seconds: f64,
        certainty: f32,
        dialect: &str,
        speaker: &str,
    ) -> Candidate {
        Candidate {
            id: id.into(),
            start: 10.0,
            end: 10.0 + seconds,
            speaker: speaker.into(),
            dialect: dialect.into(),
            words: vec!["a".into(), "b".into()],
            certainties: vec![certainty, certainty],
        }
    }

    fn profile(dialects: &[(&str, usize)]) -> TrainingProfile {
        TrainingProfile {
            dialect_rows: dialects.iter().map(|&(d, n)| (d.to_string(), n)).collect(),
            ..TrainingProfile::default()
        }
    }

    #[test]
    fn lowest_confidence_first_within_the_budget() {
        let pool = vec![
            candidate("sure", 60.0, 0.95, "", ""),
            candidate("unsure", 60.0, 0.3, "", ""),
            candidate("middling", 60.0, 0.6, "", ""),
            candidate("long", 600.0, 0.1, "", ""),
        ];
        let list = shortlist(
            &pool,
            &TrainingProfile::default(),
            &Calibration::IDENTITY,
            &RankWeights::default(),
            150.0,
        );
        let ids: Vec<&str> = list
            .chosen
            .iter()
            .map(|r| pool[r.index].id.as_str())
            .collect();
        // "long" is the worst but does not fit; the two worst that fit are taken
        assert_eq!(ids, ["unsure", "middling"]);
        assert_eq!(list.chosen[1].cumulative_seconds, 120.0);
        assert_eq!(list.pool_seconds, 780.0);
    }

    #[test]
    fn rarity_spreads_the_budget_over_dialects() {
        // equal confidence; "x" is well covered in training, "y" absent: y first, and after
        // two y segments an x segment's priority is above the third y's
        let pool = vec![
            candidate("x1", 10.0, 0.5, "x", ""),
            candidate("y1", 10.0, 0.5, "y", ""),
            candidate("y2", 10.0, 0.5, "y", ""),
            candidate("y3", 10.0, 0.5, "y", ""),
        ];
        let weights = RankWeights {
            dialect: 1.0,
            ..RankWeights::default()
        };
        let list = shortlist(
            &pool,
            &profile(&[("x", 2), ("z", 0)]),
            &Calibration::IDENTITY,
            &weights,
            40.0,
        );
        let ids: Vec<&str> = list
            .chosen
            .iter()
            .map(|r| pool[r.index].id.as_str())
            .collect();
        // mean rows m = 1: y rarity 1, then 1/2, then 1/3; x rarity 1/3 from the start
        assert_eq!(ids, ["y1", "y2", "x1", "y3"]);
        assert!((list.chosen[0].dialect_rarity - 1.0).abs() < 1e-12);
        assert!((list.chosen[2].dialect_rarity - 1.0 / 3.0).abs() < 1e-12);
        // the lazy heap gives exactly the greedy order: each pick is the highest priority then
        let priorities: Vec<f64> = list.chosen.iter().map(|r| r.priority).collect();
        let sorted = {
            let mut p = priorities.clone();
            p.sort_by(|a, b| b.total_cmp(a));
            p
        };
        assert_eq!(priorities, sorted);
    }

    #[test]
    fn bad_segments_are_listed_not_fatal() {
        let mut bad = candidate("bad", 5.0, 0.5, "", "");
        bad.end = bad.start - 1.0;
        let pool = vec![bad, candidate("good", 5.0, 0.5, "", "")];
        let list = shortlist(
            &pool,
            &TrainingProfile::default(),
            &Calibration::IDENTITY,
            &RankWeights::default(),
            100.0,
        );
        assert_eq!(list.chosen.len(), 1);
        let message = list.skipped[0].to_string();
        assert!(
            message.starts_with("segment `bad`: expected an end after the start"),
            "{message}"
        );
    }

    #[test]
    fn unknown_words_raise_priority() {
        let mut known = candidate("known", 10.0, 0.8, "", "");
        known.words = vec!["the".into(), "river".into()];
        let mut strange = known.clone();
        strange.id = "strange".into();
        strange.words = vec!["the".into(), "wendle".into()];
        let mut profile = TrainingProfile::default();
        profile
            .vocabulary
            .extend(["the".to_string(), "river".to_string()]);
        let list = shortlist(
            &[known, strange],
            &profile,
            &Calibration::IDENTITY,
            &RankWeights::default(),
            10.0,
        );
        assert_eq!(list.chosen[0].index, 1);
        assert_eq!(list.chosen[0].unknown_share, 0.5);
    }

    #[test]
    fn rank_correlation_by_hand() {
        assert_eq!(
            rank_correlation(&[1.0, 2.0, 3.0], &[10.0, 20.0, 30.0]),
            Some(1.0)
        );
        assert_eq!(
            rank_correlation(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0]),
            Some(-1.0)
        );
        assert_eq!(rank_correlation(&[1.0, 1.0], &[1.0, 2.0]), None);
        // ties share their mean rank: ranks (1.5, 1.5, 3) and (1, 2, 3) → r = √3/2
        let r = rank_correlation(&[5.0, 5.0, 7.0], &[1.0, 2.0, 3.0]).unwrap();
        assert!((r - 3f64.sqrt() / 2.0).abs() < 1e-12);
    }
}

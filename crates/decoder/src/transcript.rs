//! Decoding results and the step shared by every decoder: from a label sequence and an alignment
//! to words with frames and confidences.

use ndarray::ArrayView2;
use serde::Serialize;

use crate::graph::SearchGraph;

/// One recognised word with the frames its units fire in and a confidence.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DecodedWord {
    /// The word as written in the lexicon (or spelled from the units without one).
    pub text: String,
    /// First output frame of the word's first unit.
    pub start_frame: u32,
    /// One past the last output frame of the word's last unit (so `end_frame > start_frame`).
    pub end_frame: u32,
    /// Geometric mean, over the word's units, of each unit's highest posterior among the frames
    /// the best alignment assigns to it: in (0, 1], 1 when every unit fires with certainty.
    pub confidence: f32,
}

/// The result of decoding one utterance.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Transcript {
    /// Recognised words in order.
    pub words: Vec<DecodedWord>,
    /// The unit-id sequence (blanks removed, repeats collapsed) the words were read from.
    pub units: Vec<u32>,
    /// The search objective of this hypothesis: acoustic score + LM weight × LM log probability
    /// (words and `</s>`) + word bonus × word count.
    pub score: f32,
    /// `ln P(units | posteriors)` summed over all alignments for the beam search, the best
    /// path's log probability for greedy decoding.
    pub acoustic_score: f32,
}

impl Transcript {
    /// No words, from no frames (both scores 0, the log of certainty).
    pub fn empty() -> Transcript {
        Transcript {
            words: Vec::new(),
            units: Vec::new(),
            score: 0.0,
            acoustic_score: 0.0,
        }
    }

    /// The words joined by single spaces.
    pub fn text(&self) -> String {
        let words: Vec<&str> = self.words.iter().map(|w| w.text.as_str()).collect();
        words.join(" ")
    }
}

/// Where a word sits in a label sequence and how it is written.
pub(crate) struct WordSpan {
    pub text: String,
    /// Index of the first and last label of the word.
    pub first: usize,
    pub last: usize,
}

/// For each label of a sequence, the frames the alignment gives it.
#[derive(Debug, Clone, Copy)]
pub(crate) struct LabelRun {
    pub first_frame: u32,
    pub last_frame: u32,
    /// Highest log posterior of the label over its frames.
    pub peak: f32,
}

pub(crate) fn spell(graph: &SearchGraph, units: &[u32], out: &mut String) {
    out.clear();
    for &u in units {
        out.push_str(&graph.units()[u as usize]);
    }
}

/// Words with frames from spans and runs.
pub(crate) fn timed_words(spans: Vec<WordSpan>, runs: &[LabelRun]) -> Vec<DecodedWord> {
    spans
        .into_iter()
        .map(|span| {
            let units = &runs[span.first..=span.last];
            let mean_peak = units.iter().map(|r| r.peak).sum::<f32>() / units.len() as f32;
            DecodedWord {
                text: span.text,
                start_frame: units[0].first_frame,
                end_frame: units[units.len() - 1].last_frame + 1,
                confidence: mean_peak.exp().min(1.0),
            }
        })
        .collect()
}

/// Best CTC alignment (Viterbi) of `labels` to the posteriors; one run per label. Scratch
/// vectors are passed in so that repeated calls do not allocate once they have grown.
pub(crate) fn viterbi_runs(
    log_posteriors: ArrayView2<'_, f32>,
    labels: &[u32],
    scores: &mut Vec<f32>,
    back: &mut Vec<u8>,
    runs: &mut Vec<LabelRun>,
) {
    runs.clear();
    if labels.is_empty() {
        return;
    }
    let frames = log_posteriors.nrows();
    // Extended sequence: blank, l1, blank, l2, ..., lL, blank.
    let states = 2 * labels.len() + 1;
    let symbol = |s: usize| {
        if s.is_multiple_of(2) {
            0
        } else {
            labels[s / 2] as usize
        }
    };
    scores.clear();
    scores.resize(2 * states, f32::NEG_INFINITY);
    back.clear();
    back.resize(frames * states, 0);
    let (mut prev, mut cur) = (0usize, states);
    scores[prev] = log_posteriors[[0, 0]];
    if states > 1 {
        scores[prev + 1] = log_posteriors[[0, symbol(1)]];
    }
    for t in 1..frames {
        for s in 0..states {
            let mut best = scores[prev + s];
            let mut from = 0u8;
            if s >= 1 && scores[prev + s - 1] > best {
                best = scores[prev + s - 1];
                from = 1;
            }
            if s >= 2 && s % 2 == 1 && symbol(s) != symbol(s - 2) && scores[prev + s - 2] > best {
                best = scores[prev + s - 2];
                from = 2;
            }
            scores[cur + s] = best + log_posteriors[[t, symbol(s)]];
            back[t * states + s] = from;
        }
        std::mem::swap(&mut prev, &mut cur);
    }
    let mut s = if states >= 2 && scores[prev + states - 2] > scores[prev + states - 1] {
        states - 2
    } else {
        states - 1
    };
    runs.resize(
        labels.len(),
        LabelRun {
            first_frame: u32::MAX,
            last_frame: 0,
            peak: f32::NEG_INFINITY,
        },
    );
    for t in (0..frames).rev() {
        if s % 2 == 1 {
            let run = &mut runs[s / 2];
            run.first_frame = t as u32;
            run.last_frame = run.last_frame.max(t as u32);
            run.peak = run.peak.max(log_posteriors[[t, symbol(s)]]);
        }
        s -= back[t * states + s] as usize;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn viterbi_follows_the_obvious_peaks() {
        // frames: a a blank b ; units: blank, a, b
        let p = |x: f32| x.ln();
        let lp = Array2::from_shape_vec(
            (4, 3),
            vec![
                p(0.1),
                p(0.8),
                p(0.1),
                p(0.2),
                p(0.7),
                p(0.1),
                p(0.9),
                p(0.05),
                p(0.05),
                p(0.1),
                p(0.1),
                p(0.8),
            ],
        )
        .unwrap();
        let (mut a, mut b, mut runs) = (Vec::new(), Vec::new(), Vec::new());
        viterbi_runs(lp.view(), &[1, 2], &mut a, &mut b, &mut runs);
        assert_eq!((runs[0].first_frame, runs[0].last_frame), (0, 1));
        assert_eq!((runs[1].first_frame, runs[1].last_frame), (3, 3));
        assert!((runs[0].peak - p(0.8)).abs() < 1e-6);
        // a repeated label needs a blank between its two runs
        viterbi_runs(lp.view(), &[1, 1], &mut a, &mut b, &mut runs);
        assert!(runs[0].last_frame + 1 < runs[1].first_frame);
    }
}

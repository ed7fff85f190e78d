//! Best-path decoding: the most probable unit in every frame, repeats collapsed, blanks dropped.

use ndarray::ArrayView2;

use crate::graph::SearchGraph;
use crate::transcript::{spell, timed_words, LabelRun, Transcript, WordSpan};
use crate::{check_posteriors, DecodeError, Decoder};

/// Greedy (best-path) decoding. It ignores any lexicon and LM: words are split at the boundary
/// unit and spelled from the unit symbols, or every unit is a word when the model has no
/// boundary unit. The best path is also the alignment, so word frames come from it directly.
#[derive(Debug, Clone)]
pub struct GreedyDecoder<'a> {
    graph: &'a SearchGraph,
}

impl<'a> GreedyDecoder<'a> {
    /// A greedy decoder over the graph's units.
    pub fn new(graph: &'a SearchGraph) -> Self {
        GreedyDecoder { graph }
    }
}

impl Decoder for GreedyDecoder<'_> {
    fn decode(&mut self, log_posteriors: ArrayView2<'_, f32>) -> Result<Transcript, DecodeError> {
        check_posteriors(self.graph, log_posteriors)?;
        let mut labels = Vec::new();
        let mut runs: Vec<LabelRun> = Vec::new();
        let mut path_score = 0.0;
        let mut previous = 0usize;
        for (t, row) in log_posteriors.rows().into_iter().enumerate() {
            let (best, &p) = row
                .iter()
                .enumerate()
                .fold(
                    (0, &f32::NEG_INFINITY),
                    |acc, x| if x.1 > acc.1 { x } else { acc },
                );
            path_score += p;
            if best != 0 {
                if best == previous {
                    if let Some(run) = runs.last_mut() {
                        run.last_frame = t as u32;
                        run.peak = run.peak.max(p);
                    }
                } else {
                    labels.push(best as u32);
                    runs.push(LabelRun {
                        first_frame: t as u32,
                        last_frame: t as u32,
                        peak: p,
                    });
                }
            }
            previous = best;
        }
        let mut spans = Vec::new();
        let mut text = String::new();
        match self.graph.boundary() {
            None => {
                for i in 0..labels.len() {
                    spell(self.graph, &labels[i..=i], &mut text);
                    spans.push(WordSpan {
                        text: text.clone(),
                        first: i,
                        last: i,
                    });
                }
            }
            Some(boundary) => {
                let mut start = 0;
                for i in 0..=labels.len() {
                    if i < labels.len() && labels[i] != boundary {
                        continue;
                    }
                    if i > start {
                        spell(self.graph, &labels[start..i], &mut text);
                        spans.push(WordSpan {
                            text: text.clone(),
                            first: start,
                            last: i - 1,
                        });
                    }
                    start = i + 1;
                }
            }
        }
        Ok(Transcript {
            words: timed_words(spans, &runs),
            units: labels,
            score: path_score,
            acoustic_score: path_score,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn collapses_repeats_drops_blanks_and_splits_at_the_boundary() {
        let units: Vec<String> = ["<ctc-blank>", "a", "b", "<wb>"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let graph = SearchGraph::lexicon_free(units).unwrap();
        // best path: a a _ a <wb> b b
        let best = [1, 1, 0, 1, 3, 2, 2];
        let mut lp = Array2::from_elem((best.len(), 4), (0.1f32).ln());
        for (t, &u) in best.iter().enumerate() {
            lp[[t, u]] = (0.7f32).ln();
        }
        let out = GreedyDecoder::new(&graph).decode(lp.view()).unwrap();
        assert_eq!(out.units, vec![1, 1, 3, 2]);
        assert_eq!(out.text(), "aa b");
        assert_eq!((out.words[0].start_frame, out.words[0].end_frame), (0, 4));
        assert_eq!((out.words[1].start_frame, out.words[1].end_frame), (5, 7));
        assert!((out.words[1].confidence - 0.7).abs() < 1e-5);
        assert!((out.score - 7.0 * (0.7f32).ln()).abs() < 1e-4);
    }
}

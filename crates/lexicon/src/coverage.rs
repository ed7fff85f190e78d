//! Coverage of a corpus by a lexicon: which share of word types and running words (tokens) the
//! lexicon has a pronunciation for, and the out-of-vocabulary words with their counts.

use std::collections::{HashMap, HashSet};

use serde::Serialize;

use crate::Lexicon;

/// Type and token coverage of a token stream by a lexicon.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Coverage {
    /// Running words counted.
    pub tokens: usize,
    /// Running words the lexicon lists.
    pub covered_tokens: usize,
    /// Distinct words counted.
    pub types: usize,
    /// Distinct words the lexicon lists.
    pub covered_types: usize,
    /// Words the lexicon lacks with how often each occurs, most frequent first (ties in
    /// alphabetical order).
    pub oov: Vec<(String, usize)>,
}

impl Coverage {
    /// Counts `tokens` against the words of `lexicon` (exact string match; callers tokenize,
    /// normally with the scoring crate's token rules so that coverage counts the scored words).
    pub fn count<'a>(lexicon: &Lexicon, tokens: impl IntoIterator<Item = &'a str>) -> Coverage {
        let known: HashSet<&str> = lexicon.entries.iter().map(|(w, _)| w.as_str()).collect();
        let mut counts: HashMap<&str, usize> = HashMap::new();
        for token in tokens {
            *counts.entry(token).or_default() += 1;
        }
        let mut coverage = Coverage {
            tokens: counts.values().sum(),
            covered_tokens: 0,
            types: counts.len(),
            covered_types: 0,
            oov: Vec::new(),
        };
        for (word, count) in counts {
            if known.contains(word) {
                coverage.covered_types += 1;
                coverage.covered_tokens += count;
            } else {
                coverage.oov.push((word.to_string(), count));
            }
        }
        coverage
            .oov
            .sort_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
        coverage
    }

    /// Share of running words covered, in `[0, 1]` (0 for an empty corpus).
    pub fn token_rate(&self) -> f64 {
        ratio(self.covered_tokens, self.tokens)
    }

    /// Share of distinct words covered, in `[0, 1]` (0 for an empty corpus).
    pub fn type_rate(&self) -> f64 {
        ratio(self.covered_types, self.types)
    }
}

fn ratio(part: usize, whole: usize) -> f64 {
    if whole == 0 {
        0.0
    } else {
        part as f64 / whole as f64
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_types_tokens_and_oov() {
        let lexicon = Lexicon::graphemes(["the", "owd", "hoose"], None);
        let text = "the owd hoose the mill the mill yonder";
        let coverage = Coverage::count(&lexicon, text.split_whitespace());
        assert_eq!(coverage.tokens, 8);
        assert_eq!(coverage.covered_tokens, 5);
        assert_eq!(coverage.types, 5);
        assert_eq!(coverage.covered_types, 3);
        assert_eq!(
            coverage.oov,
            [("mill".to_string(), 2), ("yonder".to_string(), 1)]
        );
        assert!((coverage.token_rate() - 5.0 / 8.0).abs() < 1e-12);
        assert_eq!(Coverage::count(&lexicon, []).token_rate(), 0.0);
    }
}

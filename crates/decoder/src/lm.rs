//! The language-model interface the search needs, and two small implementations.
//!
//! The search only ever asks "how likely is this word after that history, and what is the new
//! history", so the trait is state based: a model hands out an opaque, small, copyable
//! [`LanguageModel::State`] and the search stores one per hypothesis. All scores are natural-log
//! probabilities, the same base as the acoustic model's posteriors, so that the LM weight is the
//! only conversion factor between the two.

use std::collections::HashMap;
use std::fmt::Debug;
use std::hash::Hash;

/// A word-level language model queried through history states.
pub trait LanguageModel: Sync {
    /// The history a prediction depends on (for an n-gram model, the last n−1 words).
    type State: Copy + Eq + Hash + Debug + Send + Sync;
    /// The model's own handle for a word of its vocabulary.
    type Word: Copy + Debug + Send + Sync;

    /// The state at the start of a sentence (context `<s>`).
    fn start_state(&self) -> Self::State;

    /// `ln P(word | state)` and the state after the word.
    fn score(&self, state: &Self::State, word: Self::Word) -> (f32, Self::State);

    /// `ln P(</s> | state)`.
    fn end_score(&self, state: &Self::State) -> f32;

    /// The handle of a word spelled `text`, if the model knows it.
    fn lookup(&self, text: &str) -> Option<Self::Word>;

    /// The handle that stands for unknown words (`<unk>`), if the model has one.
    fn unknown(&self) -> Option<Self::Word>;

    /// A history-free estimate of the word's log probability, used for look-ahead through the
    /// lexicon trie (only for ranking partial words, never added to a final score). The default
    /// scores the word at the start of a sentence.
    fn lookahead_score(&self, word: Self::Word) -> f32 {
        self.score(&self.start_state(), word).0
    }
}

/// No language model: every word costs nothing. Decoding with it is pure acoustic search
/// (plus the word bonus).
#[derive(Debug, Clone, Copy, Default)]
pub struct NoLanguageModel;

impl LanguageModel for NoLanguageModel {
    type State = ();
    type Word = ();

    fn start_state(&self) {}

    fn score(&self, _state: &(), _word: ()) -> (f32, ()) {
        (0.0, ())
    }

    fn end_score(&self, _state: &()) -> f32 {
        0.0
    }

    fn lookup(&self, _text: &str) -> Option<()> {
        Some(())
    }

    fn unknown(&self) -> Option<()> {
        Some(())
    }

    fn lookahead_score(&self, _word: ()) -> f32 {
        0.0
    }
}

/// A bigram model given as an explicit table of log probabilities: small enough to write by
/// hand in a test or an example, and a second implementation of the trait that keeps the search
/// honest about not depending on one model's internals. The table need not be normalised.
#[derive(Debug, Clone)]
pub struct BigramModel {
    words: Vec<String>,
    index: HashMap<String, u32>,
    /// `[previous][next]`, previous = word index or `words.len()` for `<s>`.
    table: Vec<Vec<f32>>,
    /// `ln P(</s> | previous)`, indexed like the rows of `table`.
    end: Vec<f32>,
}

impl BigramModel {
    /// Builds the model. `table[p][n]` is `ln P(words[n] | words[p])`; row `words.len()` is the
    /// sentence start `<s>`. `end[p]` is `ln P(</s> | words[p])`, with the same row indexing.
    ///
    /// Returns `None` when the table or end column does not have `words.len() + 1` rows of
    /// `words.len()` entries.
    pub fn new(words: Vec<String>, table: Vec<Vec<f32>>, end: Vec<f32>) -> Option<Self> {
        let n = words.len();
        if table.len() != n + 1 || end.len() != n + 1 || table.iter().any(|row| row.len() != n) {
            return None;
        }
        let index = words
            .iter()
            .enumerate()
            .map(|(i, w)| (w.clone(), i as u32))
            .collect();
        Some(BigramModel {
            words,
            index,
            table,
            end,
        })
    }

    /// The vocabulary in index order.
    pub fn words(&self) -> &[String] {
        &self.words
    }
}

impl LanguageModel for BigramModel {
    type State = u32;
    type Word = u32;

    fn start_state(&self) -> u32 {
        self.words.len() as u32
    }

    fn score(&self, state: &u32, word: u32) -> (f32, u32) {
        (self.table[*state as usize][word as usize], word)
    }

    fn end_score(&self, state: &u32) -> f32 {
        self.end[*state as usize]
    }

    fn lookup(&self, text: &str) -> Option<u32> {
        self.index.get(text).copied()
    }

    fn unknown(&self) -> Option<u32> {
        self.lookup("<unk>")
    }
}

/// `ln 10`: ARPA files store base-10 logarithms, the search works in natural logarithms.
const LN_10: f32 = std::f32::consts::LN_10;

/// The project's n-gram model. Scores are converted from log10 to natural log; a model
/// without `</s>` charges nothing for ending the sentence (rather than making every
/// hypothesis impossible).
impl LanguageModel for isogloss_lm::ArpaModel {
    type State = isogloss_lm::LmState;
    type Word = isogloss_lm::WordIndex;

    fn start_state(&self) -> Self::State {
        self.sentence_start()
    }

    fn score(&self, state: &Self::State, word: Self::Word) -> (f32, Self::State) {
        let (log10, next) = isogloss_lm::ArpaModel::score(self, state, word);
        (log10 * LN_10, next)
    }

    fn end_score(&self, state: &Self::State) -> f32 {
        if self.sentence_end_word().is_none() {
            return 0.0;
        }
        self.sentence_end(state) * LN_10
    }

    fn lookup(&self, text: &str) -> Option<Self::Word> {
        self.word_index(text)
    }

    fn unknown(&self) -> Option<Self::Word> {
        self.unknown_word()
    }

    /// The unigram probability: the best a word can do without knowing its history.
    fn lookahead_score(&self, word: Self::Word) -> f32 {
        isogloss_lm::ArpaModel::score(self, &isogloss_lm::LmState::EMPTY, word).0 * LN_10
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn arpa_scores_are_natural_logs_of_the_file_values() {
        // a hand-written bigram model in the ARPA back-off format
        let text = "\\data\\\nngram 1=4\nngram 2=2\n\n\\1-grams:\n-1.0\t<s>\t-0.5\n-0.7\thallo\t-0.3\n\
                    -1.2\twelt\n-0.9\t</s>\n\n\\2-grams:\n-0.2\t<s> hallo\n-0.4\thallo welt\n\n\\end\\\n";
        let model = isogloss_lm::ArpaModel::read_from(text.as_bytes(), "inline.arpa").unwrap();
        let lm: &dyn LanguageModel<State = isogloss_lm::LmState, Word = isogloss_lm::WordIndex> =
            &model;
        let hallo = lm.lookup("hallo").unwrap();
        let welt = lm.lookup("welt").unwrap();
        let (p, s) = lm.score(&lm.start_state(), hallo);
        assert!((p - (-0.2f32) * LN_10).abs() < 1e-5);
        let (p, s) = lm.score(&s, welt);
        assert!((p - (-0.4f32) * LN_10).abs() < 1e-5);
        // back-off (ARPA format): P(</s> | welt) = P(</s>), welt has no back-off weight (0)
        assert!((lm.end_score(&s) - (-0.9f32) * LN_10).abs() < 1e-5);
        // P(welt | <s>) backs off: bo(<s>) + P(welt)
        assert!((lm.score(&lm.start_state(), welt).0 - (-0.5f32 - 1.2) * LN_10).abs() < 1e-5);
        assert!((lm.lookahead_score(welt) - (-1.2f32) * LN_10).abs() < 1e-5);
        assert!(lm.unknown().is_none());
    }

    #[test]
    fn bigram_model_reads_its_table() {
        let lm = BigramModel::new(
            vec!["a".into(), "b".into()],
            vec![vec![-1.0, -2.0], vec![-3.0, -4.0], vec![-5.0, -6.0]],
            vec![-7.0, -8.0, -9.0],
        )
        .unwrap();
        let s = lm.start_state();
        let b = lm.lookup("b").unwrap();
        let (p, s2) = lm.score(&s, b);
        assert_eq!(p, -6.0);
        assert_eq!(lm.score(&s2, lm.lookup("a").unwrap()).0, -3.0);
        assert_eq!(lm.end_score(&s2), -8.0);
        assert_eq!(lm.end_score(&s), -9.0);
        assert!(lm.unknown().is_none());
        assert!(BigramModel::new(vec!["a".into()], vec![vec![0.0]], vec![0.0, 0.0]).is_none());
    }
}

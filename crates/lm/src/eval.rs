//! Perplexity, out-of-vocabulary rate and token count of a text under a model.
//!
//! Conventions (`docs/language-models.md`): every predicted token counts, words and `</s>` alike; `<s>` is context
//! only; an out-of-vocabulary word is scored as `<unk>`. If the model has no `<unk>`, such words
//! cannot be scored: they are left out of the perplexity (and out of `tokens`) but still counted
//! as out-of-vocabulary, and the history continues past them.

use std::path::Path;

use crate::arpa::{open_text, LineReader};
use crate::error::LmError;
use crate::model::{ArpaModel, WordIndex};

/// The result of scoring a text.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Perplexity {
    /// Sum of log10 P over the scored tokens.
    pub log10_probability: f64,
    /// Scored tokens (words and `</s>`).
    pub tokens: usize,
    /// Words of the text (without `</s>`).
    pub words: usize,
    /// Words not in the model's vocabulary.
    pub oov_words: usize,
    /// Sentences (non-empty lines).
    pub sentences: usize,
}

impl Perplexity {
    /// 10^(−log10 P / tokens).
    pub fn perplexity(&self) -> f64 {
        if self.tokens == 0 {
            return f64::NAN;
        }
        10f64.powf(-self.log10_probability / self.tokens as f64)
    }

    /// Out-of-vocabulary words over all words (the `</s>` tokens are not words).
    pub fn oov_rate(&self) -> f64 {
        if self.words == 0 {
            return 0.0;
        }
        self.oov_words as f64 / self.words as f64
    }
}

/// Something that gives `log10 P(word | history)` for whole histories: a single model or a mixture.
pub trait SentenceScorer {
    /// Maps a word to the scorer's index, `None` if it is out of vocabulary.
    fn index(&self, word: &str) -> Option<WordIndex>;
    /// The index OOV words are scored as.
    fn unknown(&self) -> Option<WordIndex>;
    /// The index of `<s>`.
    fn start(&self) -> Option<WordIndex>;
    /// The index of `</s>`.
    fn end(&self) -> Option<WordIndex>;
    /// `log10 P(word | history)` (the history begins with `<s>`).
    fn log10_probability(&self, history: &[WordIndex], word: WordIndex) -> f64;
}

impl SentenceScorer for ArpaModel {
    fn index(&self, word: &str) -> Option<WordIndex> {
        self.word_index(word)
    }
    fn unknown(&self) -> Option<WordIndex> {
        self.unknown_word()
    }
    fn start(&self) -> Option<WordIndex> {
        self.sentence_start_word()
    }
    fn end(&self) -> Option<WordIndex> {
        self.sentence_end_word()
    }
    fn log10_probability(&self, history: &[WordIndex], word: WordIndex) -> f64 {
        ArpaModel::log10_probability(self, history, word)
    }
}

/// Adds one sentence's scores to `result`.
pub fn score_sentence<S: SentenceScorer + ?Sized>(
    scorer: &S,
    words: &[&str],
    result: &mut Perplexity,
) {
    let mut history: Vec<WordIndex> = scorer.start().into_iter().collect();
    for word in words {
        result.words += 1;
        let index = match scorer.index(word) {
            Some(index) if Some(index) != scorer.unknown() => Some(index),
            _ => {
                result.oov_words += 1;
                scorer.unknown()
            }
        };
        if let Some(index) = index {
            result.log10_probability += scorer.log10_probability(&history, index);
            result.tokens += 1;
            history.push(index);
        }
    }
    if let Some(end) = scorer.end() {
        result.log10_probability += scorer.log10_probability(&history, end);
        result.tokens += 1;
    }
    result.sentences += 1;
}

/// Scores sentences given as word lists (empty ones are skipped).
pub fn evaluate_sentences<S: SentenceScorer + ?Sized>(
    scorer: &S,
    sentences: impl IntoIterator<Item = Vec<String>>,
) -> Perplexity {
    let mut result = Perplexity::default();
    for sentence in sentences {
        if !sentence.is_empty() {
            let words: Vec<&str> = sentence.iter().map(String::as_str).collect();
            score_sentence(scorer, &words, &mut result);
        }
    }
    result
}

/// Reads a text (one sentence a line; blank lines skipped) into word lists.
pub fn read_sentences(path: &Path) -> Result<Vec<Vec<String>>, LmError> {
    let mut lines = LineReader::new(open_text(path)?, path);
    let mut sentences = Vec::new();
    while let Some(line) = lines.next_line()? {
        let words: Vec<String> = line.split_whitespace().map(str::to_string).collect();
        if !words.is_empty() {
            sentences.push(words);
        }
    }
    if sentences.is_empty() {
        return Err(LmError::Text {
            path: path.to_path_buf(),
            line: lines.line,
            message: "expected at least one line with words, found none (empty text)".to_string(),
        });
    }
    Ok(sentences)
}

/// Scores a text file.
pub fn evaluate_text<S: SentenceScorer + ?Sized>(
    scorer: &S,
    path: &Path,
) -> Result<Perplexity, LmError> {
    Ok(evaluate_sentences(scorer, read_sentences(path)?))
}

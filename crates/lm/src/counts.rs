//! Counting n-grams of orders 1–6 over sentences, by sorting packed keys.
//!
//! Every sentence is framed by one `<s>` and one `</s>`. Only the highest order is counted from
//! the text directly, together with the n-grams that begin with `<s>` (they cannot be extended
//! to the left). Every other n-gram occurrence has a left neighbour, so the n-grams of order n are
//! exactly the suffixes of the distinct (n+1)-grams plus those beginning with `<s>`; deriving them
//! this way yields raw counts (sum of the extensions' counts) and continuation counts (number of
//! distinct extensions) in one sort per order, and links each n-gram to its suffix for free.
//!
//! Words are numbered `<s>` = 0, `</s>` = 1, `<unk>` = 2, then in order of first appearance; an
//! n-gram is packed into a `u128` with the first word in the high bits, so numeric order is
//! lexicographic order, n-grams sharing a context are contiguous, and those beginning with `<s>`
//! come first. The packing limits the vocabulary to 2^(128 / order) words (2 097 152 at order 6).

use std::path::{Path, PathBuf};

use crate::arpa::{open_text, LineReader};
use crate::error::LmError;
use crate::model::{WordMap, MAX_ORDER, SENTENCE_END, SENTENCE_START, UNKNOWN_WORD};

pub(crate) const START_ID: u32 = 0;
pub(crate) const END_ID: u32 = 1;
pub(crate) const UNKNOWN_ID: u32 = 2;

/// Counts of one order n ≥ 2, sorted by n-gram.
#[derive(Clone, Debug, Default)]
pub(crate) struct CountLevel {
    /// Packed n-grams, ascending.
    pub(crate) keys: Vec<u128>,
    /// How often each n-gram occurs in the text.
    pub(crate) raw: Vec<u32>,
    /// The count the Kneser-Ney family uses: raw for the highest order and for n-grams beginning
    /// with `<s>`, otherwise the number of distinct words seen before the n-gram.
    pub(crate) kneser_ney: Vec<u32>,
    /// Index of the suffix (the n-gram without its first word) in the order below; for bigrams
    /// the word index of the second word.
    pub(crate) suffix: Vec<u32>,
    /// Index of the prefix (the n-gram without its last word) in the order below.
    pub(crate) prefix: Vec<u32>,
}

/// N-gram counts of a text, ready for [`crate::estimate`].
#[derive(Clone, Debug)]
pub struct NgramCounts {
    order: usize,
    pub(crate) words: Vec<String>,
    bits: u32,
    /// Unigram counts, indexed by word.
    pub(crate) unigram_raw: Vec<u64>,
    pub(crate) unigram_kneser_ney: Vec<u64>,
    /// `levels[n - 2]` holds order n.
    pub(crate) levels: Vec<CountLevel>,
    sentences: usize,
    tokens: usize,
}

/// Options for counting a text.
#[derive(Clone, Debug, Default)]
pub struct CountOptions {
    /// A closed vocabulary: words outside it are counted as `<unk>`, and every word in it gets a
    /// unigram even when the text never uses it. `None`: the vocabulary is the text's words.
    pub vocabulary: Option<Vec<String>>,
}

fn check_order(order: usize) -> Result<(), LmError> {
    if order == 0 || order > MAX_ORDER {
        return Err(LmError::UnsupportedOrder {
            found: order,
            max: MAX_ORDER,
        });
    }
    Ok(())
}

/// Numbers words and collects sentences as a flat stream `<s> w … </s> <s> …`.
struct TokenStream {
    words: Vec<String>,
    index: WordMap,
    closed: bool,
    tokens: Vec<u32>,
    sentences: usize,
}

impl TokenStream {
    fn new(options: &CountOptions) -> Self {
        let mut stream = TokenStream {
            words: Vec::new(),
            index: WordMap::default(),
            closed: options.vocabulary.is_some(),
            tokens: Vec::new(),
            sentences: 0,
        };
        for marker in [SENTENCE_START, SENTENCE_END, UNKNOWN_WORD] {
            stream.intern(marker);
        }
        for word in options.vocabulary.iter().flatten() {
            stream.intern(word);
        }
        stream
    }

    fn intern(&mut self, word: &str) -> u32 {
        if let Some(&id) = self.index.get(word) {
            return id;
        }
        let id = self.words.len() as u32;
        self.words.push(word.to_string());
        self.index.insert(word.to_string(), id);
        id
    }

    /// Adds one sentence; `<s>`/`</s>` inside a sentence would break the framing and are
    /// reported by the caller.
    fn push_sentence<'a>(&mut self, words: impl Iterator<Item = &'a str>) {
        self.tokens.push(START_ID);
        for word in words {
            let id = match self.index.get(word) {
                Some(&id) => id,
                None if self.closed => UNKNOWN_ID,
                None => self.intern(word),
            };
            self.tokens.push(id);
        }
        self.tokens.push(END_ID);
        self.sentences += 1;
    }
}

fn is_marker(word: &str) -> bool {
    word == SENTENCE_START || word == SENTENCE_END
}

impl NgramCounts {
    /// Counts arbitrary token sequences (one sentence per item) up to `order` (1–6), with an
    /// open vocabulary. Empty sentences are skipped.
    pub fn from_sentences(
        sentences: impl IntoIterator<Item = Vec<String>>,
        order: usize,
    ) -> Result<Self, LmError> {
        Self::from_sentences_with(sentences, order, &CountOptions::default())
    }

    /// Like [`NgramCounts::from_sentences`], with options (closed vocabulary).
    pub fn from_sentences_with(
        sentences: impl IntoIterator<Item = Vec<String>>,
        order: usize,
        options: &CountOptions,
    ) -> Result<Self, LmError> {
        check_order(order)?;
        let mut stream = TokenStream::new(options);
        for (position, sentence) in sentences.into_iter().enumerate() {
            if let Some(marker) = sentence.iter().find(|word| is_marker(word)) {
                return Err(LmError::Invalid(format!(
                    "sentence {}: expected words only, found the marker '{marker}' (markers are added around every sentence)",
                    position + 1
                )));
            }
            if !sentence.is_empty() {
                stream.push_sentence(sentence.iter().map(String::as_str));
            }
        }
        if stream.sentences == 0 {
            return Err(LmError::Invalid(
                "expected at least one non-empty sentence, found none".to_string(),
            ));
        }
        Self::count(stream, order)
    }

    /// Counts text files (UTF-8 or gzip, one sentence a line, words separated by white space).
    pub fn from_text_files(
        paths: &[PathBuf],
        order: usize,
        options: &CountOptions,
    ) -> Result<Self, LmError> {
        check_order(order)?;
        let mut stream = TokenStream::new(options);
        for path in paths {
            let before = stream.sentences;
            let mut lines = LineReader::new(open_text(path)?, path);
            while let Some(line) = lines.next_line()? {
                let marker = line
                    .split_whitespace()
                    .find(|word| is_marker(word))
                    .map(str::to_string);
                if let Some(marker) = marker {
                    return Err(LmError::Text {
                        path: path.clone(),
                        line: lines.line,
                        message: format!(
                            "expected words only, found the marker '{marker}' (markers are added around every line)"
                        ),
                    });
                }
                let mut words = line.split_whitespace().peekable();
                if words.peek().is_some() {
                    stream.push_sentence(words);
                }
            }
            if stream.sentences == before {
                return Err(LmError::Text {
                    path: path.clone(),
                    line: lines.line,
                    message: "expected at least one line with words, found none (empty text)"
                        .to_string(),
                });
            }
        }
        if stream.sentences == 0 {
            return Err(LmError::Invalid(
                "expected at least one text file, found none".to_string(),
            ));
        }
        Self::count(stream, order)
    }

    fn count(stream: TokenStream, order: usize) -> Result<Self, LmError> {
        let TokenStream {
            words,
            tokens,
            sentences,
            ..
        } = stream;
        let vocabulary_size = words.len();
        let bits = (32 - (vocabulary_size as u32 - 1).leading_zeros()).max(1);
        if bits as usize * order > 128 {
            return Err(LmError::Invalid(format!(
                "a vocabulary of {vocabulary_size} words is too large for order {order}: expected at most 2^{} words",
                128 / order
            )));
        }
        let pack = |ngram: &[u32]| {
            ngram
                .iter()
                .fold(0u128, |key, &word| (key << bits) | u128::from(word))
        };
        let mut unigram_raw = vec![0u64; vocabulary_size];
        let mut unigram_kneser_ney = vec![0u64; vocabulary_size];
        let token_count = tokens.len() - sentences; // every token but `<s>` is predicted
        if order == 1 {
            for &token in &tokens {
                unigram_raw[token as usize] += 1;
            }
            unigram_kneser_ney.copy_from_slice(&unigram_raw);
            unigram_kneser_ney[START_ID as usize] = 0;
            return Ok(NgramCounts {
                order,
                words,
                bits,
                unigram_raw,
                unigram_kneser_ney,
                levels: Vec::new(),
                sentences,
                tokens: token_count,
            });
        }
        // Highest-order occurrences and, per lower order, the n-grams beginning with `<s>`.
        let mut top: Vec<u128> = Vec::with_capacity(tokens.len());
        let mut starts: Vec<Vec<u128>> = vec![Vec::new(); order];
        let mut sentence_start = 0;
        for (position, &token) in tokens.iter().enumerate() {
            if token != END_ID {
                continue;
            }
            let sentence = &tokens[sentence_start..=position];
            sentence_start = position + 1;
            for window in sentence.windows(order) {
                top.push(pack(window));
            }
            for (n, keys) in starts.iter_mut().enumerate().take(order).skip(2) {
                if n <= sentence.len() {
                    keys.push(pack(&sentence[..n]));
                }
            }
        }
        drop(tokens);
        top.sort_unstable();
        let mut highest = CountLevel::default();
        for key in top {
            if highest.keys.last() == Some(&key) {
                *highest.raw.last_mut().unwrap_or(&mut 0) += 1;
            } else {
                highest.keys.push(key);
                highest.raw.push(1);
            }
        }
        highest.kneser_ney = highest.raw.clone();
        let mut levels: Vec<CountLevel> = vec![CountLevel::default(); order - 1];
        levels[order - 2] = highest;
        for n in (1..order).rev() {
            // Derive order n from the distinct (n+1)-grams.
            let upper = &mut levels[n - 1];
            let suffix_mask = if bits as usize * n >= 128 {
                u128::MAX
            } else {
                (1u128 << (bits as usize * n)) - 1
            };
            let mut suffixes: Vec<(u128, u32, u32)> = upper
                .keys
                .iter()
                .zip(&upper.raw)
                .enumerate()
                .map(|(index, (&key, &raw))| (key & suffix_mask, raw, index as u32))
                .collect();
            suffixes.sort_unstable_by_key(|&(key, _, _)| key);
            upper.suffix = vec![0; upper.keys.len()];
            if n == 1 {
                for &(key, raw, index) in &suffixes {
                    let word = key as usize;
                    unigram_raw[word] += u64::from(raw);
                    unigram_kneser_ney[word] += 1;
                    upper.suffix[index as usize] = word as u32;
                }
                unigram_raw[START_ID as usize] = sentences as u64;
                break;
            }
            let mut begin_with_start = std::mem::take(&mut starts[n]);
            begin_with_start.sort_unstable();
            let mut level = CountLevel::default();
            for key in begin_with_start {
                if level.keys.last() == Some(&key) {
                    *level.raw.last_mut().unwrap_or(&mut 0) += 1;
                } else {
                    level.keys.push(key);
                    level.raw.push(1);
                }
            }
            level.kneser_ney = level.raw.clone();
            for &(key, raw, index) in &suffixes {
                if level.keys.last() == Some(&key) {
                    *level.raw.last_mut().unwrap_or(&mut 0) += raw;
                    *level.kneser_ney.last_mut().unwrap_or(&mut 0) += 1;
                } else {
                    level.keys.push(key);
                    level.raw.push(raw);
                    level.kneser_ney.push(1);
                }
                upper.suffix[index as usize] = (level.keys.len() - 1) as u32;
            }
            levels[n - 2] = level;
        }
        // Prefix links: contexts appear in ascending order, so one merge walk per order.
        for n in 2..=order {
            let (lower, upper) = levels.split_at_mut(n - 2);
            let upper = &mut upper[0];
            if n == 2 {
                upper.prefix = upper.keys.iter().map(|&key| (key >> bits) as u32).collect();
                continue;
            }
            let lower_keys = &lower[n - 3].keys;
            let mut cursor = 0usize;
            upper.prefix = upper
                .keys
                .iter()
                .map(|&key| {
                    let prefix = key >> bits;
                    while lower_keys[cursor] < prefix {
                        cursor += 1;
                    }
                    cursor as u32
                })
                .collect();
        }
        Ok(NgramCounts {
            order,
            words,
            bits,
            unigram_raw,
            unigram_kneser_ney,
            levels,
            sentences,
            tokens: token_count,
        })
    }

    /// The n-gram order counted.
    pub fn order(&self) -> usize {
        self.order
    }

    /// Number of sentences counted.
    pub fn sentences(&self) -> usize {
        self.sentences
    }

    /// Number of predicted tokens counted (words and `</s>`).
    pub fn tokens(&self) -> usize {
        self.tokens
    }

    /// The vocabulary, `<s>`, `</s>` and `<unk>` first.
    pub fn words(&self) -> &[String] {
        &self.words
    }

    /// Number of distinct n-grams of each order (unigrams: the vocabulary including `<s>`).
    pub fn ngram_counts(&self) -> Vec<usize> {
        std::iter::once(self.words.len())
            .chain(self.levels.iter().map(|level| level.keys.len()))
            .collect()
    }

    pub(crate) fn bits(&self) -> u32 {
        self.bits
    }

    /// The raw count of an n-gram given as words (tests and diagnostics; binary search).
    pub fn raw_count(&self, ngram: &[&str]) -> u64 {
        self.lookup(ngram).map_or(0, |(raw, _)| raw)
    }

    /// The count the Kneser-Ney family uses for an n-gram (continuation count below the highest
    /// order unless it begins with `<s>`).
    pub fn kneser_ney_count(&self, ngram: &[&str]) -> u64 {
        self.lookup(ngram).map_or(0, |(_, count)| count)
    }

    fn lookup(&self, ngram: &[&str]) -> Option<(u64, u64)> {
        let ids: Option<Vec<u32>> = ngram
            .iter()
            .map(|word| {
                self.words
                    .iter()
                    .position(|known| known == word)
                    .map(|id| id as u32)
            })
            .collect();
        let ids = ids?;
        match ids.len() {
            0 => None,
            1 => Some((
                self.unigram_raw[ids[0] as usize],
                self.unigram_kneser_ney[ids[0] as usize],
            )),
            n if n <= self.order => {
                let key = ids
                    .iter()
                    .fold(0u128, |key, &word| (key << self.bits) | u128::from(word));
                let level = &self.levels[n - 2];
                let index = level.keys.binary_search(&key).ok()?;
                Some((
                    u64::from(level.raw[index]),
                    u64::from(level.kneser_ney[index]),
                ))
            }
            _ => None,
        }
    }
}

/// Reads a vocabulary file: one word per line (the first white-space separated field), blank
/// lines skipped. `<s>`, `</s>` and `<unk>` are always part of the vocabulary.
pub fn read_vocabulary(path: &Path) -> Result<Vec<String>, LmError> {
    let mut lines = LineReader::new(open_text(path)?, path);
    let mut words = Vec::new();
    while let Some(line) = lines.next_line()? {
        if let Some(word) = line.split_whitespace().next() {
            words.push(word.to_string());
        }
    }
    if words.is_empty() {
        return Err(LmError::Text {
            path: path.to_path_buf(),
            line: lines.line,
            message: "expected a vocabulary (one word a line), found no words".to_string(),
        });
    }
    Ok(words)
}

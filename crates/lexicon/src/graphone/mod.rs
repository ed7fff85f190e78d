//! Joint-sequence (graphone) grapheme-to-phoneme conversion after Bisani & Ney (2008),
//! "Joint-sequence models for grapheme-to-phoneme conversion", Speech Communication 50(5).
//!
//! Training: letters and phonemes of every dictionary entry are aligned into graphones (pairs
//! of 0–2 letters and 0–2 phonemes, never both empty) by EM over a unigram graphone model
//! ([`align`]); the best segmentation of each entry is then modelled by an n-gram over graphones,
//! estimated by the LM crate (interpolated modified Kneser-Ney, the project's LM conventions:
//! a word is a sentence, its graphones the tokens). Decoding: a beam search over the letters of a
//! new word extends each hypothesis by every graphone whose letters come next, scores it with
//! the n-gram and keeps the best; hypotheses that reach the same n-gram state with the same
//! phonemes are merged by adding their probabilities, so a pronunciation's score sums over its
//! segmentations. Scores are log10 joint probabilities P(letters, phonemes).
//!
//! Training has no random choice, so it is deterministic: the same dictionary and settings
//! give the same model file, byte for byte.

pub mod align;

use std::collections::{HashMap, HashSet};
use std::fmt::Write as _;
use std::path::Path;

use align::{Aligner, GraphoneKey, Pair, Shape, SymbolId};
use isogloss_lm::{estimate, ArpaModel, LmState, NgramCounts, Smoothing, WordIndex};

use crate::{letters, Lexicon, LexiconError};

/// A graphone's position in a model's inventory.
pub type TokenId = u32;

/// What the decoder needs from a graphone n-gram; scores are log10 probabilities. The beam
/// search is written against this, not against a particular model.
pub trait GraphoneLm {
    /// The history the next score depends on.
    type State: Clone + Eq + std::hash::Hash;
    /// The state at the start of a word (context `<s>`).
    fn start(&self) -> Self::State;
    /// log10 P(graphone | state) and the state after it.
    fn score(&self, state: &Self::State, graphone: TokenId) -> (f32, Self::State);
    /// log10 P(`</s>` | state).
    fn end(&self, state: &Self::State) -> f32;
}

/// The graphone n-gram as an LM-crate back-off model whose words are graphone ids (`"17"`).
#[derive(Debug, Clone)]
struct GraphoneNgram {
    model: ArpaModel,
    /// The model's word index of every graphone id.
    words: Vec<WordIndex>,
}

impl GraphoneNgram {
    /// Wraps a model; `None` when some graphone is missing from its vocabulary.
    fn new(model: ArpaModel, graphones: usize) -> Option<GraphoneNgram> {
        let words = (0..graphones)
            .map(|id| model.word_index(&id.to_string()))
            .collect::<Option<Vec<_>>>()?;
        model.sentence_end_word()?;
        Some(GraphoneNgram { model, words })
    }
}

impl GraphoneLm for GraphoneNgram {
    type State = LmState;

    fn start(&self) -> LmState {
        self.model.sentence_start()
    }

    fn score(&self, state: &LmState, graphone: TokenId) -> (f32, LmState) {
        self.model.score(state, self.words[graphone as usize])
    }

    fn end(&self, state: &LmState) -> f32 {
        self.model.sentence_end(state)
    }
}

/// Most EM iterations of the alignment (it converges within tens).
pub const MAX_ITERATIONS: usize = 1000;

/// Widest beam of the pronunciation search, and most pronunciations asked for per word.
pub const MAX_BEAM: usize = 10_000;

impl DecodeConfig {
    /// Checks the beam and the n-best count: 1 to [`MAX_BEAM`] each.
    pub fn validate(&self) -> Result<(), LexiconError> {
        for (name, value) in [("beam", self.beam), ("nbest", self.nbest)] {
            if !(1..=MAX_BEAM).contains(&value) {
                return Err(LexiconError::Parameter(format!(
                    "expected a {name} from 1 to {MAX_BEAM}, found {value}"
                )));
            }
        }
        Ok(())
    }
}

/// Training settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct G2pConfig {
    /// N-gram order over graphones (1 to [`isogloss_lm::MAX_ORDER`]).
    pub order: usize,
    /// EM iterations for the alignment.
    pub iterations: usize,
    /// Most letters in a graphone (1 or 2).
    pub max_letters: usize,
    /// Most phonemes in a graphone (1 or 2).
    pub max_phonemes: usize,
    /// Weight in `(0, 1]` on a graphone per side with two symbols during alignment (see
    /// [`align::Shape::multi_symbol_penalty`]).
    pub multi_symbol_penalty: f64,
}

impl Default for G2pConfig {
    fn default() -> Self {
        G2pConfig {
            order: 6,
            iterations: 10,
            max_letters: 2,
            max_phonemes: 2,
            // Best of 0.1, 0.3 and 0.5 on the full CMUdict held-out benchmark (see the example).
            multi_symbol_penalty: 0.3,
        }
    }
}

/// Decoding settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DecodeConfig {
    /// Hypotheses kept per letter position.
    pub beam: usize,
    /// Pronunciations returned per word.
    pub nbest: usize,
}

impl Default for DecodeConfig {
    fn default() -> Self {
        DecodeConfig { beam: 40, nbest: 1 }
    }
}

/// One training step done, for a progress display.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainingProgress {
    /// Steps done so far (1-based).
    pub step: usize,
    /// All steps: EM iterations, then segmentation, then n-gram estimation.
    pub steps: usize,
    /// What the step was, with its figures (e.g. the log-likelihood).
    pub message: String,
}

/// A graphone: a few letters and the phonemes they stand for.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct Graphone {
    /// 0–2 letters.
    pub letters: Vec<String>,
    /// 0–2 phonemes.
    pub phonemes: Vec<String>,
}

/// A pronunciation with its score.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoredPronunciation {
    /// Phoneme symbols.
    pub phonemes: Vec<String>,
    /// log10 P(letters, phonemes), summed over the segmentations the beam kept.
    pub log10_probability: f64,
}

/// Why a word got no pronunciation from the model.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum G2pFailure {
    /// The word has no letter.
    NoLetters,
    /// These letters never occurred in the training dictionary.
    UnseenLetters(Vec<String>),
    /// No graphone sequence spells the word (its letters occur, but not in a combination the
    /// model can cover).
    NoPath,
}

impl std::fmt::Display for G2pFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            G2pFailure::NoLetters => write!(f, "expected at least one letter, found none"),
            G2pFailure::UnseenLetters(letters) => write!(
                f,
                "the training dictionary never had the letter(s) {}",
                letters
                    .iter()
                    .map(|l| format!("`{l}`"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            G2pFailure::NoPath => write!(f, "no graphone sequence of the model spells this word"),
        }
    }
}

/// A trained joint-sequence model.
#[derive(Debug, Clone)]
pub struct G2pModel {
    graphones: Vec<Graphone>,
    ngram: GraphoneNgram,
    /// Letter sequence (0–2 letters) → graphone ids that spell it.
    by_letters: HashMap<Vec<String>, Vec<TokenId>>,
    /// Every letter some graphone spells.
    known_letters: HashSet<String>,
    /// Phoneme symbols by id, and each graphone's phonemes as ids (the beam compares ids).
    phoneme_names: Vec<String>,
    graphone_phonemes: Vec<Vec<u32>>,
}

/// The letters of a word as the model sees them: lower-cased, NFC, one string per letter.
fn word_letters(word: &str) -> Vec<String> {
    letters(&word.to_lowercase())
}

fn has_letter(word: &str) -> bool {
    word.chars().any(char::is_alphabetic)
}

struct Interner {
    ids: HashMap<String, SymbolId>,
    names: Vec<String>,
}

impl Interner {
    fn new() -> Interner {
        Interner {
            ids: HashMap::new(),
            names: Vec::new(),
        }
    }

    fn id(&mut self, symbol: &str) -> Result<SymbolId, LexiconError> {
        if let Some(&id) = self.ids.get(symbol) {
            return Ok(id);
        }
        if self.names.len() >= 65_000 {
            return Err(LexiconError::Parameter(
                "expected fewer than 65000 distinct letters or phonemes in the dictionary".into(),
            ));
        }
        Ok(self.add(symbol))
    }

    fn add(&mut self, symbol: &str) -> SymbolId {
        let id = self.names.len() as SymbolId;
        self.ids.insert(symbol.to_string(), id);
        self.names.push(symbol.to_string());
        id
    }
}

impl G2pModel {
    /// Trains on a dictionary. Entries whose word has no letter are skipped and returned (they
    /// cannot be aligned); an empty dictionary (or one with only such entries) is an error.
    pub fn train(
        dictionary: &Lexicon,
        config: &G2pConfig,
        progress: &mut dyn FnMut(TrainingProgress),
    ) -> Result<(G2pModel, Vec<String>), LexiconError> {
        if config.order == 0 || config.order > isogloss_lm::MAX_ORDER {
            return Err(LexiconError::Parameter(format!(
                "expected an n-gram order from 1 to {}, found {}",
                isogloss_lm::MAX_ORDER,
                config.order
            )));
        }
        if !(1..=2).contains(&config.max_letters) || !(1..=2).contains(&config.max_phonemes) {
            return Err(LexiconError::Parameter(format!(
                "expected at most 1 or 2 letters and phonemes per graphone, found {} and {}",
                config.max_letters, config.max_phonemes
            )));
        }
        if !(config.multi_symbol_penalty > 0.0 && config.multi_symbol_penalty <= 1.0) {
            return Err(LexiconError::Parameter(format!(
                "expected a multi-symbol penalty in (0, 1], found {}",
                config.multi_symbol_penalty
            )));
        }
        if config.iterations > MAX_ITERATIONS {
            return Err(LexiconError::Parameter(format!(
                "expected at most {MAX_ITERATIONS} EM iterations, found {}",
                config.iterations
            )));
        }
        let mut letter_ids = Interner::new();
        let mut phoneme_ids = Interner::new();
        let mut pairs = Vec::with_capacity(dictionary.entries.len());
        let mut skipped = Vec::new();
        for (word, phonemes) in &dictionary.entries {
            if !has_letter(word) {
                skipped.push(word.clone());
                continue;
            }
            let letters = word_letters(word)
                .iter()
                .map(|l| letter_ids.id(l))
                .collect::<Result<Vec<_>, _>>()?;
            let phonemes = phonemes
                .iter()
                .map(|p| phoneme_ids.id(p))
                .collect::<Result<Vec<_>, _>>()?;
            pairs.push(Pair { letters, phonemes });
        }
        if pairs.is_empty() {
            return Err(LexiconError::Parameter(
                "expected at least one dictionary entry whose word has a letter, found none".into(),
            ));
        }
        let steps = config.iterations + 2;
        let shape = Shape {
            max_letters: config.max_letters,
            max_phonemes: config.max_phonemes,
            multi_symbol_penalty: config.multi_symbol_penalty,
        };
        let mut aligner = Aligner::new(&pairs, shape);
        for iteration in 1..=config.iterations {
            let (log_likelihood, underflows) = aligner.iterate(&pairs);
            progress(TrainingProgress {
                step: iteration,
                steps,
                message: format!(
                    "alignment iteration {iteration}: log-likelihood {log_likelihood:.1}{}",
                    if underflows > 0 {
                        format!(" ({underflows} entries too long to align)")
                    } else {
                        String::new()
                    }
                ),
            });
        }
        let paths = aligner.viterbi(&pairs);
        // Keep only graphones some segmentation uses, numbered in first-use order.
        let mut used: HashMap<u32, TokenId> = HashMap::new();
        let mut graphones = Vec::new();
        let mut sequences = Vec::with_capacity(paths.len());
        for path in paths.into_iter().flatten() {
            let sequence: Vec<TokenId> = path
                .iter()
                .map(|&id| {
                    *used.entry(id).or_insert_with(|| {
                        graphones.push(decode_key(
                            aligner.keys[id as usize],
                            &letter_ids.names,
                            &phoneme_ids.names,
                        ));
                        (graphones.len() - 1) as TokenId
                    })
                })
                .collect();
            sequences.push(sequence);
        }
        progress(TrainingProgress {
            step: config.iterations + 1,
            steps,
            message: format!(
                "segmented {} entries into {} distinct graphones",
                sequences.len(),
                graphones.len()
            ),
        });
        let sentences = sequences
            .iter()
            .map(|sequence| sequence.iter().map(|id| id.to_string()).collect());
        let counts = NgramCounts::from_sentences(sentences, config.order)
            .map_err(|e| LexiconError::Parameter(format!("graphone n-gram counts: {e}")))?;
        let estimated = estimate(&counts, Smoothing::ModifiedKneserNey)
            .map_err(|e| LexiconError::Parameter(format!("graphone n-gram: {e}")))?;
        let ngram = GraphoneNgram::new(estimated.model, graphones.len()).ok_or_else(|| {
            LexiconError::Parameter("the graphone n-gram lacks a graphone or `</s>`".into())
        })?;
        let mut message = format!("estimated the {}-gram over graphones", config.order);
        for warning in &estimated.warnings {
            message.push_str("; ");
            message.push_str(warning);
        }
        progress(TrainingProgress {
            step: steps,
            steps,
            message,
        });
        Ok((G2pModel::assemble(graphones, ngram), skipped))
    }

    fn assemble(graphones: Vec<Graphone>, ngram: GraphoneNgram) -> G2pModel {
        let mut by_letters: HashMap<Vec<String>, Vec<TokenId>> = HashMap::new();
        for (id, graphone) in graphones.iter().enumerate() {
            by_letters
                .entry(graphone.letters.clone())
                .or_default()
                .push(id as TokenId);
        }
        let known_letters = graphones
            .iter()
            .flat_map(|g| g.letters.iter().cloned())
            .collect();
        let mut phonemes = Interner::new();
        let graphone_phonemes = graphones
            .iter()
            .map(|g| {
                g.phonemes
                    .iter()
                    .map(|p| {
                        phonemes
                            .ids
                            .get(p)
                            .copied()
                            .unwrap_or_else(|| phonemes.add(p))
                    })
                    .collect()
            })
            .collect();
        G2pModel {
            graphones,
            ngram,
            by_letters,
            known_letters,
            phoneme_names: phonemes.names,
            graphone_phonemes,
        }
    }

    /// The graphone inventory (ids are positions).
    pub fn graphones(&self) -> &[Graphone] {
        &self.graphones
    }

    /// The n-gram order.
    pub fn order(&self) -> usize {
        self.ngram.model.order()
    }

    /// The `config.nbest` most probable pronunciations of `word`, best first.
    pub fn pronounce(
        &self,
        word: &str,
        config: &DecodeConfig,
    ) -> Result<Vec<ScoredPronunciation>, G2pFailure> {
        if !has_letter(word) {
            return Err(G2pFailure::NoLetters);
        }
        let letters = word_letters(word);
        let mut unseen: Vec<String> = letters
            .iter()
            .filter(|l| !self.known_letters.contains(*l))
            .cloned()
            .collect();
        if !unseen.is_empty() {
            unseen.dedup();
            return Err(G2pFailure::UnseenLetters(unseen));
        }
        let result = decode(
            &self.ngram,
            &self.graphone_phonemes,
            &self.by_letters,
            &letters,
            config,
        );
        if result.is_empty() {
            return Err(G2pFailure::NoPath);
        }
        Ok(result
            .into_iter()
            .map(|(ids, log10_probability)| ScoredPronunciation {
                phonemes: ids
                    .iter()
                    .map(|&id| self.phoneme_names[id as usize].clone())
                    .collect(),
                log10_probability,
            })
            .collect())
    }

    /// Writes the model as one UTF-8 text file: a header and the graphone inventory (a graphone's
    /// id is its position, `letters<TAB>phonemes`, symbols space-separated), then the n-gram in
    /// ARPA back-off format with graphone ids as words. ARPA readers skip everything before
    /// `\data\`, so the n-gram part reads as it is.
    pub fn write(&self, path: &Path) -> Result<(), LexiconError> {
        let mut text = String::new();
        text.push_str("isogloss joint-sequence grapheme-to-phoneme model\n");
        let _ = writeln!(text, "format\t1");
        let _ = writeln!(text, "graphones\t{}", self.graphones.len());
        for graphone in &self.graphones {
            let _ = writeln!(
                text,
                "{}\t{}",
                graphone.letters.join(" "),
                graphone.phonemes.join(" ")
            );
        }
        let mut bytes = text.into_bytes();
        self.ngram
            .model
            .write_arpa_to(&mut bytes)
            .map_err(|source| LexiconError::Io {
                path: path.to_path_buf(),
                source,
            })?;
        isogloss_corpus::tsv::write_atomically(path, &bytes)?;
        Ok(())
    }

    /// Reads a model written by [`G2pModel::write`]; errors name the file and line.
    pub fn read(path: &Path) -> Result<G2pModel, LexiconError> {
        let text = isogloss_corpus::tsv::read_utf8(path)?;
        let error = |line: usize, message: String| LexiconError::Format {
            path: path.to_path_buf(),
            line,
            message,
        };
        let lines: Vec<&str> = text.lines().map(|l| l.trim_end_matches('\r')).collect();
        let field = |index: usize, name: &str| -> Result<usize, LexiconError> {
            let line = lines.get(index).copied().unwrap_or("");
            match line.split_once('\t') {
                Some((key, value)) if key == name => value.trim().parse().map_err(|_| {
                    error(
                        index + 1,
                        format!("expected a number after `{name}`, found `{value}`"),
                    )
                }),
                _ => Err(error(
                    index + 1,
                    format!("expected a `{name}<TAB>number` line, found `{line}`"),
                )),
            }
        };
        if lines.first().copied() != Some("isogloss joint-sequence grapheme-to-phoneme model") {
            return Err(error(
                1,
                "expected the line `isogloss joint-sequence grapheme-to-phoneme model` \
                 (is this a G2P model file?)"
                    .into(),
            ));
        }
        let format = field(1, "format")?;
        if format != 1 {
            return Err(error(2, format!("expected model format 1, found {format}")));
        }
        let count = field(2, "graphones")?;
        // Each graphone takes a line of its own: a count beyond the lines left is a lie.
        let lines_left = lines.len().saturating_sub(3);
        if count > lines_left {
            return Err(error(
                3,
                format!(
                    "the header announces {count} graphones, but only {lines_left} lines follow"
                ),
            ));
        }
        let mut graphones = Vec::with_capacity(count);
        for index in 3..3 + count {
            let Some(content) = lines.get(index) else {
                return Err(error(
                    index + 1,
                    format!("expected {count} graphone lines, found the end of the file"),
                ));
            };
            let (letters, phonemes) = content.split_once('\t').ok_or_else(|| {
                error(
                    index + 1,
                    format!("expected `letters<TAB>phonemes`, found `{content}`"),
                )
            })?;
            let split = |s: &str| s.split_whitespace().map(str::to_string).collect::<Vec<_>>();
            let graphone = Graphone {
                letters: split(letters),
                phonemes: split(phonemes),
            };
            if graphone.letters.len() > 2
                || graphone.phonemes.len() > 2
                || graphone.letters.len() + graphone.phonemes.len() == 0
            {
                return Err(error(
                    index + 1,
                    format!(
                        "expected 0–2 letters and 0–2 phonemes, not both none, found `{content}`"
                    ),
                ));
            }
            graphones.push(graphone);
        }
        // The whole text goes to the ARPA reader so that its line numbers are the file's.
        let model = ArpaModel::read_from(text.as_bytes(), path)?;
        let ngram = GraphoneNgram::new(model, graphones.len()).ok_or_else(|| {
            LexiconError::Parameter(format!(
                "{}: expected the n-gram to list all {} graphones and `</s>`, found fewer",
                path.display(),
                graphones.len()
            ))
        })?;
        Ok(G2pModel::assemble(graphones, ngram))
    }
}

fn decode_key(key: GraphoneKey, letters: &[String], phonemes: &[String]) -> Graphone {
    let part = |shift: u32, names: &[String]| -> Option<String> {
        let value = (key >> shift) & 0xFFFF;
        (value > 0).then(|| names[(value - 1) as usize].clone())
    };
    Graphone {
        letters: [part(0, letters), part(16, letters)]
            .into_iter()
            .flatten()
            .collect(),
        phonemes: [part(32, phonemes), part(48, phonemes)]
            .into_iter()
            .flatten()
            .collect(),
    }
}

/// One partial pronunciation in the beam.
#[derive(Clone)]
struct Hypothesis<S> {
    state: S,
    /// Phoneme ids so far.
    phonemes: Vec<u32>,
    /// Whether the last graphone had no letters (two such in a row are not allowed, so that a
    /// word cannot grow phonemes without end).
    after_insertion: bool,
    log10_probability: f64,
}

fn log10_add(a: f64, b: f64) -> f64 {
    let (high, low) = if a > b { (a, b) } else { (b, a) };
    if low == f64::NEG_INFINITY {
        high
    } else {
        high + (1.0 + 10f64.powf(low - high)).log10()
    }
}

/// Merges hypotheses with the same state, phonemes and insertion flag (their futures are the
/// same, so adding their probabilities marginalises over segmentations), then keeps the `beam`
/// best, ties broken by phoneme ids for determinism.
fn prune<S: Clone + Eq + std::hash::Hash>(
    hypotheses: Vec<Hypothesis<S>>,
    beam: usize,
) -> Vec<Hypothesis<S>> {
    let mut merged: HashMap<(S, Vec<u32>, bool), f64> = HashMap::with_capacity(hypotheses.len());
    for hypothesis in hypotheses {
        let key = (
            hypothesis.state,
            hypothesis.phonemes,
            hypothesis.after_insertion,
        );
        let entry = merged.entry(key).or_insert(f64::NEG_INFINITY);
        *entry = log10_add(*entry, hypothesis.log10_probability);
    }
    let mut kept: Vec<Hypothesis<S>> = merged
        .into_iter()
        .map(
            |((state, phonemes, after_insertion), log10_probability)| Hypothesis {
                state,
                phonemes,
                after_insertion,
                log10_probability,
            },
        )
        .collect();
    kept.sort_by(|a, b| {
        b.log10_probability
            .total_cmp(&a.log10_probability)
            .then_with(|| a.phonemes.cmp(&b.phonemes))
            .then_with(|| a.after_insertion.cmp(&b.after_insertion))
    });
    kept.truncate(beam);
    kept
}

/// Beam search over letter positions (see the module docs); returns phoneme-id sequences with
/// their log10 probabilities, best first.
fn decode<L: GraphoneLm>(
    lm: &L,
    graphone_phonemes: &[Vec<u32>],
    by_letters: &HashMap<Vec<String>, Vec<TokenId>>,
    letters: &[String],
    config: &DecodeConfig,
) -> Vec<(Vec<u32>, f64)> {
    let beam = config.beam.max(1);
    let n = letters.len();
    let mut at: Vec<Vec<Hypothesis<L::State>>> = vec![Vec::new(); n + 1];
    at[0].push(Hypothesis {
        state: lm.start(),
        phonemes: Vec::new(),
        after_insertion: false,
        log10_probability: 0.0,
    });
    let extend = |hypothesis: &Hypothesis<L::State>, graphone: TokenId, inserted: bool| {
        let (p, state) = lm.score(&hypothesis.state, graphone);
        let mut phonemes = hypothesis.phonemes.clone();
        phonemes.extend_from_slice(&graphone_phonemes[graphone as usize]);
        Hypothesis {
            state,
            phonemes,
            after_insertion: inserted,
            log10_probability: hypothesis.log10_probability + f64::from(p),
        }
    };
    let insertions: &[TokenId] = by_letters.get(&Vec::new()).map_or(&[], Vec::as_slice);
    for position in 0..=n {
        let mut current = prune(std::mem::take(&mut at[position]), beam);
        // Graphones without letters stay at this position (at most one in a row).
        let mut inserted = Vec::new();
        for hypothesis in current.iter().filter(|h| !h.after_insertion) {
            for &g in insertions {
                inserted.push(extend(hypothesis, g, true));
            }
        }
        if !inserted.is_empty() {
            current.extend(inserted);
            current = prune(current, beam);
        }
        for width in 1..=2 {
            if position + width > n {
                break;
            }
            let Some(candidates) = by_letters.get(&letters[position..position + width]) else {
                continue;
            };
            for hypothesis in &current {
                for &g in candidates {
                    at[position + width].push(extend(hypothesis, g, false));
                }
            }
        }
        at[position] = current;
    }
    let mut by_pronunciation: HashMap<Vec<u32>, f64> = HashMap::new();
    for hypothesis in &at[n] {
        if hypothesis.phonemes.is_empty() {
            continue;
        }
        let total = hypothesis.log10_probability + f64::from(lm.end(&hypothesis.state));
        let entry = by_pronunciation
            .entry(hypothesis.phonemes.clone())
            .or_insert(f64::NEG_INFINITY);
        *entry = log10_add(*entry, total);
    }
    let mut results: Vec<(Vec<u32>, f64)> = by_pronunciation
        .into_iter()
        .filter(|(_, p)| p.is_finite())
        .collect();
    results.sort_by(|a, b| b.1.total_cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
    results.truncate(config.nbest.max(1));
    results
}

/// Levenshtein distance between two phoneme sequences (unit costs).
pub fn edit_distance(a: &[String], b: &[String]) -> usize {
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, x) in a.iter().enumerate() {
        let mut diagonal = row[0];
        row[0] = i + 1;
        for (j, y) in b.iter().enumerate() {
            let substitution = diagonal + usize::from(x != y);
            diagonal = row[j + 1];
            row[j + 1] = substitution.min(row[j] + 1).min(row[j + 1] + 1);
        }
    }
    row[b.len()]
}

/// Word and phoneme errors of a model on held-out words.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Evaluation {
    /// Words evaluated.
    pub words: usize,
    /// Words whose best pronunciation matches none of the references.
    pub word_errors: usize,
    /// Edit operations to the closest reference, summed.
    pub phoneme_errors: usize,
    /// Phonemes in those closest references, summed.
    pub reference_phonemes: usize,
}

impl Evaluation {
    /// Word error rate in `[0, 1]`.
    pub fn word_error_rate(&self) -> f64 {
        self.word_errors as f64 / self.words.max(1) as f64
    }

    /// Phoneme error rate (edits over reference phonemes).
    pub fn phoneme_error_rate(&self) -> f64 {
        self.phoneme_errors as f64 / self.reference_phonemes.max(1) as f64
    }
}

/// Evaluates the best pronunciation of every word of `held_out` against all its references
/// (the usual protocol for dictionaries with variants: the closest reference counts). A word
/// the model cannot pronounce counts as a word error with every reference phoneme wrong.
pub fn evaluate(model: &G2pModel, held_out: &Lexicon, config: &DecodeConfig) -> Evaluation {
    let index = held_out.index();
    let mut evaluation = Evaluation::default();
    for word in held_out.words() {
        let references = &index[word];
        let hypothesis = model
            .pronounce(
                word,
                &DecodeConfig {
                    nbest: 1,
                    ..*config
                },
            )
            .ok()
            .and_then(|mut n| n.drain(..).next())
            .map(|p| p.phonemes)
            .unwrap_or_default();
        let (errors, length) = references
            .iter()
            .map(|r| (edit_distance(&hypothesis, r), r.len()))
            .min()
            .unwrap_or((0, 0));
        evaluation.words += 1;
        evaluation.word_errors += usize::from(errors > 0);
        evaluation.phoneme_errors += errors;
        evaluation.reference_phonemes += length;
    }
    evaluation
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strings(s: &str) -> Vec<String> {
        s.split_whitespace().map(str::to_string).collect()
    }

    fn toy_dictionary() -> Lexicon {
        Lexicon::from_entries(
            [
                ("cat", "K AE T"),
                ("cab", "K AE B"),
                ("tab", "T AE B"),
                ("bat", "B AE T"),
                ("tax", "T AE K S"),
                ("ax", "AE K S"),
                ("act", "AE K T"),
                ("tact", "T AE K T"),
                ("back", "B AE K"),
                ("tack", "T AE K"),
            ]
            .into_iter()
            .map(|(w, p)| (w.to_string(), strings(p))),
        )
    }

    #[test]
    fn learns_a_toy_dictionary_and_generalises() {
        let config = G2pConfig {
            order: 3,
            ..G2pConfig::default()
        };
        let mut steps = Vec::new();
        let (model, skipped) =
            G2pModel::train(&toy_dictionary(), &config, &mut |p| steps.push(p.step)).unwrap();
        assert!(skipped.is_empty());
        assert_eq!(steps, (1..=config.iterations + 2).collect::<Vec<_>>());
        let decode = DecodeConfig { beam: 20, nbest: 3 };
        let best = model.pronounce("cat", &decode).unwrap();
        assert_eq!(best[0].phonemes, strings("K AE T"));
        assert!(best
            .windows(2)
            .all(|w| w[0].log10_probability >= w[1].log10_probability));
        // A new word made of known pieces.
        assert_eq!(
            model.pronounce("cax", &decode).unwrap()[0].phonemes,
            strings("K AE K S")
        );
        assert_eq!(
            model.pronounce("bab", &decode).unwrap()[0].phonemes,
            strings("B AE B")
        );
        assert_eq!(model.pronounce("'", &decode), Err(G2pFailure::NoLetters));
        assert_eq!(
            model.pronounce("zap", &decode),
            Err(G2pFailure::UnseenLetters(vec!["z".into(), "p".into()]))
        );
    }

    /// Issue 16: `graphones<TAB>99999999999` was used as an allocation size (an abort), and
    /// `18446744073709551615` overflowed (a panic). A count beyond the lines that follow is an
    /// error naming the file and line.
    #[test]
    fn a_graphone_count_beyond_the_file_is_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("lying.g2p");
        for count in ["99999999999", "18446744073709551615", "3"] {
            std::fs::write(
                &path,
                format!("isogloss joint-sequence grapheme-to-phoneme model\nformat\t1\ngraphones\t{count}\nc\tK\n"),
            )
            .unwrap();
            let message = G2pModel::read(&path).unwrap_err().to_string();
            assert!(
                message.contains("lying.g2p")
                    && message.contains("line 3")
                    && message.contains(&format!(
                        "announces {count} graphones, but only 1 lines follow"
                    )),
                "{message}"
            );
        }
    }

    #[test]
    fn decoding_settings_are_bounded() {
        for (beam, nbest) in [(0, 1), (1, 0), (MAX_BEAM + 1, 1), (1, usize::MAX)] {
            assert!(DecodeConfig { beam, nbest }.validate().is_err());
        }
        DecodeConfig::default().validate().unwrap();
    }

    #[test]
    fn model_file_round_trips_and_training_is_deterministic() {
        let dir = tempfile::tempdir().unwrap();
        let config = G2pConfig {
            order: 3,
            ..G2pConfig::default()
        };
        let (model, _) = G2pModel::train(&toy_dictionary(), &config, &mut |_| {}).unwrap();
        let first = dir.path().join("a.g2p");
        model.write(&first).unwrap();
        let (again, _) = G2pModel::train(&toy_dictionary(), &config, &mut |_| {}).unwrap();
        let second = dir.path().join("b.g2p");
        again.write(&second).unwrap();
        assert_eq!(
            std::fs::read(&first).unwrap(),
            std::fs::read(&second).unwrap()
        );
        let read = G2pModel::read(&first).unwrap();
        let decode = DecodeConfig { beam: 20, nbest: 2 };
        assert_eq!(
            read.pronounce("tab", &decode).unwrap()[0].phonemes,
            model.pronounce("tab", &decode).unwrap()[0].phonemes
        );
    }

    #[test]
    fn bad_input_is_named() {
        let error = G2pModel::train(&Lexicon::default(), &G2pConfig::default(), &mut |_| {})
            .unwrap_err()
            .to_string();
        assert!(error.contains("at least one dictionary entry"), "{error}");
        let only_marks = Lexicon::from_entries([("'".to_string(), strings("AH"))]);
        assert!(G2pModel::train(&only_marks, &G2pConfig::default(), &mut |_| {}).is_err());

        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("model.g2p");
        std::fs::write(
            &path,
            "isogloss joint-sequence grapheme-to-phoneme model\nformat\t1\ngraphones\t2\nc\tK\n",
        )
        .unwrap();
        let error = G2pModel::read(&path).unwrap_err().to_string();
        assert!(error.contains("model.g2p, line 3"), "{error}");
        assert!(
            error.contains("announces 2 graphones, but only 1 lines follow"),
            "{error}"
        );

        // A damaged n-gram part: the ARPA reader names the line of the whole file.
        let (model, _) =
            G2pModel::train(&toy_dictionary(), &G2pConfig::default(), &mut |_| {}).unwrap();
        model.write(&path).unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        let damaged_line = text
            .lines()
            .position(|l| l.starts_with("ngram 1="))
            .unwrap()
            + 1;
        std::fs::write(&path, text.replacen("ngram 1=", "ngram 1=x", 1)).unwrap();
        let error = G2pModel::read(&path).unwrap_err().to_string();
        assert!(
            error.contains(&format!(", line {damaged_line}:")),
            "{error}"
        );
    }

    /// Every graphone sequence that spells `letters` (no two letterless graphones in a row),
    /// scored by the model: the slow, obvious definition the beam search must agree with.
    fn enumerate(
        model: &G2pModel,
        letters: &[String],
        state: LmState,
        after_insertion: bool,
        phonemes: Vec<String>,
        score: f64,
        out: &mut HashMap<Vec<String>, f64>,
    ) {
        if letters.is_empty() {
            let total = score + f64::from(model.ngram.end(&state));
            if !phonemes.is_empty() {
                let entry = out.entry(phonemes.clone()).or_insert(f64::NEG_INFINITY);
                *entry = log10_add(*entry, total);
            }
        }
        for (id, graphone) in model.graphones.iter().enumerate() {
            let width = graphone.letters.len();
            if (width == 0 && after_insertion) || !letters.starts_with(&graphone.letters) {
                continue;
            }
            let (p, next) = model.ngram.score(&state, id as TokenId);
            let mut extended = phonemes.clone();
            extended.extend(graphone.phonemes.iter().cloned());
            enumerate(
                model,
                &letters[width..],
                next,
                width == 0,
                extended,
                score + f64::from(p),
                out,
            );
        }
    }

    #[test]
    fn beam_search_with_a_wide_beam_equals_exhaustive_enumeration() {
        let config = G2pConfig {
            order: 3,
            // A weak penalty keeps rival graphones for "a" in the toy model.
            multi_symbol_penalty: 0.1,
            ..G2pConfig::default()
        };
        // The toy dictionary plus words where "a" is /AA/, so that words have rival readings.
        let mut dictionary = toy_dictionary();
        for (word, phonemes) in [("bar", "B AA R"), ("tar", "T AA R"), ("car", "K AA R")] {
            dictionary
                .entries
                .push((word.to_string(), strings(phonemes)));
        }
        let (model, _) = G2pModel::train(&dictionary, &config, &mut |_| {}).unwrap();
        let mut alternatives = 0;
        for word in ["cat", "tax", "bac", "act", "tack", "cack"] {
            let mut exhaustive = HashMap::new();
            enumerate(
                &model,
                &word_letters(word),
                model.ngram.start(),
                false,
                Vec::new(),
                0.0,
                &mut exhaustive,
            );
            let mut expected: Vec<(Vec<String>, f64)> = exhaustive.into_iter().collect();
            expected.sort_by(|a, b| b.1.total_cmp(&a.1));
            let found = model
                .pronounce(
                    word,
                    &DecodeConfig {
                        beam: 100_000,
                        nbest: 3,
                    },
                )
                .unwrap();
            assert!(!expected.is_empty(), "{word}");
            assert_eq!(found.len(), expected.len().min(3), "{word}");
            alternatives += expected.len() - 1;
            for (got, (phonemes, score)) in found.iter().zip(&expected) {
                assert_eq!(&got.phonemes, phonemes, "{word}");
                assert!((got.log10_probability - score).abs() < 1e-6, "{word}");
            }
        }
        assert!(
            alternatives > 0,
            "some word must have competing pronunciations"
        );
    }

    #[test]
    fn edit_distance_matches_hand_counts() {
        // kitten → sitting: 3 edits, the textbook example (Levenshtein distance).
        let a: Vec<String> = "kitten".chars().map(String::from).collect();
        let b: Vec<String> = "sitting".chars().map(String::from).collect();
        assert_eq!(edit_distance(&a, &b), 3);
        assert_eq!(edit_distance(&[], &b), 7);
    }
}

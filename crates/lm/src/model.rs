//! The query structure: an n-gram model in back-off form, answering `log10 P(word | state)`.
//!
//! Every n-gram of order n ≥ 2 is stored as (index of its prefix (n−1)-gram, last word) and gets an
//! index of its own within its order; an open-addressing hash table per order maps that 64-bit key
//! to the entry. Each entry also knows its suffix (the (n−1)-gram without its first word), so that
//! backing off is one array read instead of a new walk from the first word.
//!
//! A decoder state ([`LmState`]) is the longest suffix of the history that exists in the model
//! *and is the prefix of a longer n-gram*: only such contexts can change a later prediction.
//! N-grams that are no one's prefix are dropped from the state at once; if such an n-gram carries
//! a back-off weight (our own writer never writes one, other files may), that weight applies to
//! every following word alike and is charged when the state is entered, so sentence totals stay
//! exact. Small states let the decoder recombine more hypotheses.

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};

/// The largest n-gram order this crate builds and reads.
pub const MAX_ORDER: usize = 6;

/// The sentence-start marker; it is context only and never predicted.
pub const SENTENCE_START: &str = "<s>";
/// The sentence-end marker; it is predicted like a word.
pub const SENTENCE_END: &str = "</s>";
/// The unknown-word token; out-of-vocabulary words are scored as this.
pub const UNKNOWN_WORD: &str = "<unk>";

/// Index of a word in one model's vocabulary (the order of its unigram list).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct WordIndex(pub u32);

/// A language-model state: the part of the history that can still matter (see the module docs).
/// Eight bytes, `Copy`, hashable, so a decoder can keep one per hypothesis and recombine on it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct LmState {
    /// Number of words of context (0 = none, at most order − 1).
    length: u8,
    /// Index of the context n-gram within its order.
    id: u32,
}

impl LmState {
    /// The empty context (unigram predictions).
    pub const EMPTY: LmState = LmState { length: 0, id: 0 };

    /// How many words of history this state keeps.
    pub fn context_length(&self) -> usize {
        usize::from(self.length)
    }
}

/// A fast non-cryptographic hasher for the vocabulary map (word strings are not adversarial here).
#[derive(Default)]
pub(crate) struct WordHasher(u64);

impl Hasher for WordHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        let mut hash = self.0;
        let mut chunks = bytes.chunks_exact(8);
        for chunk in &mut chunks {
            let mut word = [0u8; 8];
            word.copy_from_slice(chunk);
            hash = (hash.rotate_left(5) ^ u64::from_le_bytes(word))
                .wrapping_mul(0x51_7c_c1_b7_27_22_0a_95);
        }
        for &byte in chunks.remainder() {
            hash = (hash.rotate_left(5) ^ u64::from(byte)).wrapping_mul(0x51_7c_c1_b7_27_22_0a_95);
        }
        self.0 = hash;
    }
}

pub(crate) type WordMap = HashMap<String, u32, BuildHasherDefault<WordHasher>>;

const EMPTY_KEY: u64 = u64::MAX;
/// Bits of a packed next-state word that hold the entry index (the top three hold the length).
const ID_BITS: u32 = 29;
const ID_MASK: u32 = (1 << ID_BITS) - 1;
/// The most entries one order may hold (the packed next state keeps 29 bits of index).
pub const MAX_ENTRIES_PER_ORDER: usize = ID_MASK as usize;

fn ngram_key(prefix: u32, word: u32) -> u64 {
    (u64::from(prefix) << 32) | u64::from(word)
}

fn pack_state(state: LmState) -> u32 {
    (u32::from(state.length) << ID_BITS) | state.id
}

fn unpack_state(packed: u32) -> LmState {
    LmState {
        length: (packed >> ID_BITS) as u8,
        id: packed & ID_MASK,
    }
}

/// One hash-table slot: the key and what a query needs without touching the entry arrays (the
/// probability with any early back-off charge folded in, and the next state). Sixteen bytes, so a
/// slot never straddles two cache lines; the entry index lives in a parallel array that only the
/// slower paths read.
#[derive(Clone, Copy)]
struct Slot {
    key: u64,
    fast_log10_prob: f32,
    next: u32,
}

const EMPTY_SLOT: Slot = Slot {
    key: EMPTY_KEY,
    fast_log10_prob: 0.0,
    next: 0,
};

/// Open addressing with linear probing; the table is kept at most half full.
#[derive(Clone)]
struct NgramTable {
    slots: Vec<Slot>,
    /// Entry index of each slot.
    ids: Vec<u32>,
    shift: u32,
    len: usize,
}

impl NgramTable {
    fn with_capacity(entries: usize) -> Self {
        let size = (entries.max(4) * 2).next_power_of_two();
        NgramTable {
            slots: vec![EMPTY_SLOT; size],
            ids: vec![0; size],
            shift: 64 - size.trailing_zeros(),
            len: 0,
        }
    }

    #[inline]
    fn home(&self, key: u64) -> usize {
        (key.wrapping_mul(0x9E37_79B9_7F4A_7C15) >> self.shift) as usize
    }

    #[inline]
    fn position(&self, key: u64) -> Option<usize> {
        let mask = self.slots.len() - 1;
        let mut position = self.home(key);
        loop {
            let slot = &self.slots[position];
            if slot.key == key {
                return Some(position);
            }
            if slot.key == EMPTY_KEY {
                return None;
            }
            position = (position + 1) & mask;
        }
    }

    #[inline]
    fn find(&self, key: u64) -> Option<&Slot> {
        self.position(key).map(|position| &self.slots[position])
    }

    fn find_id(&self, key: u64) -> Option<u32> {
        self.position(key).map(|position| self.ids[position])
    }

    /// Inserts a new key; returns the index already stored when the key is present.
    fn insert(&mut self, key: u64, id: u32) -> Result<(), u32> {
        if (self.len + 1) * 2 > self.slots.len() {
            self.grow();
        }
        let mask = self.slots.len() - 1;
        let mut position = self.home(key);
        loop {
            let slot = &mut self.slots[position];
            if slot.key == key {
                return Err(self.ids[position]);
            }
            if slot.key == EMPTY_KEY {
                slot.key = key;
                self.ids[position] = id;
                self.len += 1;
                return Ok(());
            }
            position = (position + 1) & mask;
        }
    }

    fn grow(&mut self) {
        let old = std::mem::replace(self, NgramTable::with_capacity(self.slots.len()));
        for (slot, id) in old
            .slots
            .into_iter()
            .zip(old.ids)
            .filter(|(slot, _)| slot.key != EMPTY_KEY)
        {
            let mask = self.slots.len() - 1;
            let mut position = self.home(slot.key);
            while self.slots[position].key != EMPTY_KEY {
                position = (position + 1) & mask;
            }
            self.slots[position] = slot;
            self.ids[position] = id;
            self.len += 1;
        }
    }
}

/// What backing off from a context needs: its weight and its suffix, side by side.
#[derive(Clone, Copy)]
struct BackoffLink {
    log10_backoff: f32,
    suffix: u32,
}

/// The entries of one order.
#[derive(Clone, Default)]
struct OrderEntries {
    /// Last word of each n-gram.
    word: Vec<u32>,
    /// Index of the prefix (n−1)-gram (unused for unigrams).
    prefix: Vec<u32>,
    /// Index of the suffix (n−1)-gram (unused for unigrams).
    suffix: Vec<u32>,
    log10_prob: Vec<f64>,
    log10_backoff: Vec<f64>,
}

impl OrderEntries {
    fn len(&self) -> usize {
        self.word.len()
    }
}

/// Most entries of one order reserved in advance by [`ModelBuilder::new`].
const RESERVED_ENTRIES: usize = 1 << 16;

/// Why an n-gram could not be added (the ARPA reader adds the file and line).
#[derive(Debug)]
pub(crate) enum AddError {
    Duplicate,
    MissingPrefix(usize),
    MissingSuffix,
    TooMany,
}

impl AddError {
    pub(crate) fn describe(&self, ngram: &str) -> String {
        match self {
            AddError::Duplicate => format!("n-gram '{ngram}' is listed twice"),
            AddError::MissingPrefix(length) => format!(
                "n-gram '{ngram}': its first {length} words are not listed as an n-gram; \
                 expected every prefix of an n-gram to be in the model"
            ),
            AddError::MissingSuffix => format!(
                "n-gram '{ngram}': its last words (without the first) are not listed as an \
                 n-gram; expected every suffix of an n-gram to be in the model"
            ),
            AddError::TooMany => {
                format!("n-gram '{ngram}': more than {MAX_ENTRIES_PER_ORDER} n-grams of one order")
            }
        }
    }
}

/// Collects n-grams order by order (every prefix and suffix before the n-gram itself) and then
/// freezes them into an [`ArpaModel`].
pub(crate) struct ModelBuilder {
    /// Number of n-grams added only to restore prefix/suffix closure.
    implied: usize,
    words: Vec<String>,
    index: WordMap,
    orders: Vec<OrderEntries>,
    tables: Vec<NgramTable>,
}

impl ModelBuilder {
    /// A builder for a model of `order` (1..=6) expecting `counts[n-1]` n-grams of order n.
    /// Room is reserved for at most [`RESERVED_ENTRIES`] of each order and grows as n-grams are
    /// added: the counts may come from a file's header, which can lie.
    pub(crate) fn new(counts: &[usize]) -> Self {
        let counts: Vec<usize> = counts
            .iter()
            .map(|&count| count.min(RESERVED_ENTRIES))
            .collect();
        let mut tables = Vec::with_capacity(counts.len());
        for (position, &count) in counts.iter().enumerate() {
            // Unigrams are indexed by word directly; their table stays empty.
            tables.push(NgramTable::with_capacity(if position == 0 {
                0
            } else {
                count
            }));
        }
        ModelBuilder {
            implied: 0,
            words: Vec::with_capacity(counts.first().copied().unwrap_or(0)),
            index: WordMap::default(),
            orders: counts
                .iter()
                .map(|&count| OrderEntries {
                    word: Vec::with_capacity(count),
                    prefix: Vec::new(),
                    suffix: Vec::new(),
                    log10_prob: Vec::with_capacity(count),
                    log10_backoff: Vec::with_capacity(count),
                })
                .collect(),
            tables,
        }
    }

    pub(crate) fn order(&self) -> usize {
        self.orders.len()
    }

    pub(crate) fn word(&self, word: &str) -> Option<u32> {
        self.index.get(word).copied()
    }

    pub(crate) fn add_unigram(
        &mut self,
        word: &str,
        log10_prob: f64,
        log10_backoff: f64,
    ) -> Result<u32, AddError> {
        if self.index.contains_key(word) {
            return Err(AddError::Duplicate);
        }
        let id = self.words.len();
        if id >= MAX_ENTRIES_PER_ORDER {
            return Err(AddError::TooMany);
        }
        self.words.push(word.to_string());
        self.index.insert(word.to_string(), id as u32);
        let unigrams = &mut self.orders[0];
        unigrams.word.push(id as u32);
        unigrams.log10_prob.push(log10_prob);
        unigrams.log10_backoff.push(log10_backoff);
        Ok(id as u32)
    }

    /// Index of an n-gram given by its word indices, if present.
    pub(crate) fn find(&self, words: &[u32]) -> Option<u32> {
        let (&first, rest) = words.split_first()?;
        if first as usize >= self.words.len() {
            return None;
        }
        let mut id = first;
        for (position, &word) in rest.iter().enumerate() {
            id = self.tables[position + 1].find_id(ngram_key(id, word))?;
        }
        Some(id)
    }

    /// Index of the n-gram (prefix n-gram of order `n` − 1, `word`) of order `n` ≥ 2, if present.
    pub(crate) fn extend(&self, n: usize, prefix: u32, word: u32) -> Option<u32> {
        self.tables[n - 1].find_id(ngram_key(prefix, word))
    }

    /// Adds an n-gram of order `n` ≥ 2 given its prefix's index; the suffix is found through the
    /// prefix's own suffix (one probe).
    pub(crate) fn add_with_prefix(
        &mut self,
        n: usize,
        prefix: u32,
        word: u32,
        log10_prob: f64,
        log10_backoff: f64,
    ) -> Result<u32, AddError> {
        let suffix = if n == 2 {
            word
        } else {
            let prefix_suffix = self.orders[n - 2].suffix[prefix as usize];
            self.extend(n - 1, prefix_suffix, word)
                .ok_or(AddError::MissingSuffix)?
        };
        self.add_linked(n, prefix, word, suffix, log10_prob, log10_backoff)
    }

    /// `log10 P(words[n-1] | words[..n-1])` by back-off through what has been added so far.
    fn backoff_log10_prob(&self, words: &[u32]) -> f64 {
        let n = words.len();
        if let Some(id) = self.find(words) {
            return self.orders[n - 1].log10_prob[id as usize];
        }
        if n == 1 {
            return f64::NEG_INFINITY;
        }
        let backoff = self
            .find(&words[..n - 1])
            .map_or(0.0, |id| self.orders[n - 2].log10_backoff[id as usize]);
        backoff + self.backoff_log10_prob(&words[1..])
    }

    /// The index of an n-gram, first adding it (and, recursively, its missing prefix and suffix)
    /// with the probability the back-off already gives it and a back-off weight of one. Such an
    /// entry changes no probability; it only restores the prefix and suffix closure the query
    /// structure relies on (some pruning tools drop n-grams whose extensions they keep).
    fn find_or_add_implied(&mut self, words: &[u32]) -> Result<u32, AddError> {
        if let Some(id) = self.find(words) {
            return Ok(id);
        }
        let n = words.len();
        if n == 1 {
            return Err(AddError::MissingPrefix(1));
        }
        let prefix = self.find_or_add_implied(&words[..n - 1])?;
        let suffix = self.find_or_add_implied(&words[1..])?;
        let log10_prob = self.backoff_log10_prob(words);
        self.implied += 1;
        self.add_linked(n, prefix, words[n - 1], suffix, log10_prob, 0.0)
    }

    /// Adds an n-gram (n = `words.len()` ≥ 2) of the highest order read so far, first adding
    /// any missing prefix or suffix as an implied entry (see [`ModelBuilder::find_or_add_implied`]).
    pub(crate) fn add_ngram_implying(
        &mut self,
        words: &[u32],
        log10_prob: f64,
        log10_backoff: f64,
    ) -> Result<u32, AddError> {
        let n = words.len();
        let prefix = self.find_or_add_implied(&words[..n - 1])?;
        let suffix = self.find_or_add_implied(&words[1..])?;
        self.add_linked(n, prefix, words[n - 1], suffix, log10_prob, log10_backoff)
    }

    /// Adds an n-gram (n = `words.len()` ≥ 2) whose prefix and suffix are already present.
    pub(crate) fn add_ngram(
        &mut self,
        words: &[u32],
        log10_prob: f64,
        log10_backoff: f64,
    ) -> Result<u32, AddError> {
        let n = words.len();
        let prefix = self
            .find(&words[..n - 1])
            .ok_or(AddError::MissingPrefix(n - 1))?;
        let suffix = self.find(&words[1..]).ok_or(AddError::MissingSuffix)?;
        self.add_linked(n, prefix, words[n - 1], suffix, log10_prob, log10_backoff)
    }

    /// Adds an n-gram of order `n` ≥ 2 given the indices of its prefix and suffix (n−1)-grams.
    pub(crate) fn add_linked(
        &mut self,
        n: usize,
        prefix: u32,
        word: u32,
        suffix: u32,
        log10_prob: f64,
        log10_backoff: f64,
    ) -> Result<u32, AddError> {
        let entries = &mut self.orders[n - 1];
        let id = entries.len();
        if id >= MAX_ENTRIES_PER_ORDER {
            return Err(AddError::TooMany);
        }
        self.tables[n - 1]
            .insert(ngram_key(prefix, word), id as u32)
            .map_err(|_| AddError::Duplicate)?;
        entries.word.push(word);
        entries.prefix.push(prefix);
        entries.suffix.push(suffix);
        entries.log10_prob.push(log10_prob);
        entries.log10_backoff.push(log10_backoff);
        Ok(id as u32)
    }

    /// Freezes the model: marks which n-grams are contexts of longer ones and precomputes, for
    /// every entry, the state a query lands in and the back-off charged on entering it.
    pub(crate) fn finish(self) -> ArpaModel {
        let ModelBuilder {
            implied,
            words,
            index,
            orders,
            mut tables,
        } = self;
        let order = orders.len();
        let mut is_context: Vec<Vec<bool>> = orders
            .iter()
            .map(|entries| vec![false; entries.len()])
            .collect();
        for n in 2..=order {
            for &prefix in &orders[n - 1].prefix {
                is_context[n - 2][prefix as usize] = true;
            }
        }
        // charge[n-1][i]: back-off weights of dropped contexts, charged when entry i is entered;
        // next[n-1][i]: the state after entry i.
        let mut charge: Vec<Vec<f64>> = Vec::with_capacity(order);
        let mut next: Vec<Vec<LmState>> = Vec::with_capacity(order);
        for n in 1..=order {
            let entries = &orders[n - 1];
            let mut order_charge = Vec::with_capacity(entries.len());
            let mut order_next = Vec::with_capacity(entries.len());
            for (i, &context) in is_context[n - 1].iter().enumerate() {
                if n < order && context {
                    order_charge.push(0.0);
                    order_next.push(LmState {
                        length: n as u8,
                        id: i as u32,
                    });
                } else if n == 1 {
                    order_charge.push(entries.log10_backoff[i]);
                    order_next.push(LmState::EMPTY);
                } else {
                    let suffix = entries.suffix[i] as usize;
                    order_charge.push(entries.log10_backoff[i] + charge[n - 2][suffix]);
                    order_next.push(next[n - 2][suffix]);
                }
            }
            charge.push(order_charge);
            next.push(order_next);
        }
        let unigram_fast = (0..orders[0].len())
            .map(|i| FastEntry {
                log10_prob: (orders[0].log10_prob[i] + charge[0][i]) as f32,
                next: pack_state(next[0][i]),
            })
            .collect();
        for (n, table) in tables.iter_mut().enumerate().skip(1) {
            for (slot, &id) in table
                .slots
                .iter_mut()
                .zip(&table.ids)
                .filter(|(slot, _)| slot.key != EMPTY_KEY)
            {
                let id = id as usize;
                slot.fast_log10_prob = (orders[n].log10_prob[id] + charge[n][id]) as f32;
                slot.next = pack_state(next[n][id]);
            }
        }
        let links = orders
            .iter()
            .enumerate()
            .map(|(position, entries)| {
                (0..entries.len())
                    .map(|i| BackoffLink {
                        log10_backoff: entries.log10_backoff[i] as f32,
                        suffix: if position == 0 { 0 } else { entries.suffix[i] },
                    })
                    .collect()
            })
            .collect();
        let sentence_start = index.get(SENTENCE_START).copied();
        let sentence_end = index.get(SENTENCE_END).copied();
        let unknown = index.get(UNKNOWN_WORD).copied();
        ArpaModel {
            implied,
            words,
            index,
            orders,
            tables,
            links,
            unigram_fast,
            sentence_start,
            sentence_end,
            unknown,
        }
    }
}

#[derive(Clone, Copy)]
struct FastEntry {
    log10_prob: f32,
    next: u32,
}

/// An n-gram language model in ARPA back-off form, ready for fast state-based queries.
///
/// Build one with [`ArpaModel::read`] or with [`crate::estimate`]; query it with
/// [`ArpaModel::sentence_start`], [`ArpaModel::score`] and [`ArpaModel::sentence_end`].
#[derive(Clone)]
pub struct ArpaModel {
    implied: usize,
    words: Vec<String>,
    index: WordMap,
    orders: Vec<OrderEntries>,
    tables: Vec<NgramTable>,
    links: Vec<Vec<BackoffLink>>,
    unigram_fast: Vec<FastEntry>,
    sentence_start: Option<u32>,
    sentence_end: Option<u32>,
    unknown: Option<u32>,
}

impl std::fmt::Debug for ArpaModel {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        formatter
            .debug_struct("ArpaModel")
            .field("order", &self.order())
            .field("ngram_counts", &self.ngram_counts())
            .finish()
    }
}

impl ArpaModel {
    /// The model's order (the longest n-gram).
    pub fn order(&self) -> usize {
        self.orders.len()
    }

    /// Number of n-grams the reader added because a listed n-gram's prefix or suffix was missing
    /// from the file (they carry the probability back-off already gave them, so nothing changes).
    pub fn implied_ngrams(&self) -> usize {
        self.implied
    }

    /// Number of n-grams of each order, unigrams first.
    pub fn ngram_counts(&self) -> Vec<usize> {
        self.orders.iter().map(OrderEntries::len).collect()
    }

    /// The index of a word, `None` when it is not in the vocabulary.
    pub fn word_index(&self, word: &str) -> Option<WordIndex> {
        self.index.get(word).map(|&index| WordIndex(index))
    }

    /// The index of `<unk>`, when the model has it.
    pub fn unknown_word(&self) -> Option<WordIndex> {
        self.unknown.map(WordIndex)
    }

    /// The index of `</s>`, when the model has it.
    pub fn sentence_end_word(&self) -> Option<WordIndex> {
        self.sentence_end.map(WordIndex)
    }

    /// The index of `<s>`, when the model has it.
    pub fn sentence_start_word(&self) -> Option<WordIndex> {
        self.sentence_start.map(WordIndex)
    }

    /// The word with this index.
    pub fn word(&self, word: WordIndex) -> &str {
        &self.words[word.0 as usize]
    }

    /// Every word of the vocabulary (the unigram list, `<s>` and `</s>` included) in index order.
    pub fn vocabulary(&self) -> impl Iterator<Item = &str> {
        self.words.iter().map(String::as_str)
    }

    /// The words that can be predicted: the vocabulary without `<s>`.
    pub fn predictable_words(&self) -> impl Iterator<Item = WordIndex> + '_ {
        let start = self.sentence_start;
        (0..self.words.len() as u32)
            .filter(move |&word| Some(word) != start)
            .map(WordIndex)
    }

    /// The state at the start of a sentence: the context is `<s>` (empty if the model lacks it).
    pub fn sentence_start(&self) -> LmState {
        match self.sentence_start {
            // Not minimised: a back-off weight of `<s>` must still apply to the first word.
            Some(start) if self.order() > 1 => LmState {
                length: 1,
                id: start,
            },
            _ => LmState::EMPTY,
        }
    }

    /// `log10 P(word | state)` and the state after `word`.
    ///
    /// `word` must be an index of this model and `state` a state it produced.
    #[inline]
    pub fn score(&self, state: &LmState, word: WordIndex) -> (f32, LmState) {
        let word = word.0;
        let mut length = usize::from(state.length);
        let mut id = state.id;
        let mut backoff = 0.0f32;
        while length > 0 {
            // Read before the probe: the two loads are independent, so their cache misses overlap.
            let link = self.links[length - 1][id as usize];
            if let Some(slot) = self.tables[length].find(ngram_key(id, word)) {
                return (backoff + slot.fast_log10_prob, unpack_state(slot.next));
            }
            backoff += link.log10_backoff;
            id = link.suffix;
            length -= 1;
        }
        let entry = self.unigram_fast[word as usize];
        (backoff + entry.log10_prob, unpack_state(entry.next))
    }

    /// `log10 P(</s> | state)`; `f32::NEG_INFINITY` when the model has no `</s>`.
    pub fn sentence_end(&self, state: &LmState) -> f32 {
        match self.sentence_end {
            Some(end) => self.score(state, WordIndex(end)).0,
            None => f32::NEG_INFINITY,
        }
    }

    /// `log10 P(word | context)` in double precision, by the textbook back-off recursion on the
    /// stored values (slower than [`ArpaModel::score`]; used for perplexity and checks).
    /// Only the last order − 1 words of `context` matter.
    pub fn log10_probability(&self, context: &[WordIndex], word: WordIndex) -> f64 {
        let keep = context.len().min(self.order() - 1);
        let context = &context[context.len() - keep..];
        let mut backoff = 0.0;
        for start in 0..context.len() {
            let history: Vec<u32> = context[start..].iter().map(|word| word.0).collect();
            let Some(history_id) = self.find(&history) else {
                continue;
            };
            let n = history.len() + 1;
            if let Some(id) = self.tables[n - 1].find_id(ngram_key(history_id, word.0)) {
                return backoff + self.orders[n - 1].log10_prob[id as usize];
            }
            backoff += self.orders[n - 2].log10_backoff[history_id as usize];
        }
        backoff + self.orders[0].log10_prob[word.0 as usize]
    }

    /// Index within its order of the n-gram made of `words`, if present.
    pub(crate) fn find(&self, words: &[u32]) -> Option<u32> {
        let (&first, rest) = words.split_first()?;
        if first as usize >= self.words.len() {
            return None;
        }
        let mut id = first;
        for (position, &word) in rest.iter().enumerate() {
            id = self.tables[position + 1].find_id(ngram_key(id, word))?;
        }
        Some(id)
    }

    /// The words of entry `id` of order `n`, first word first.
    pub(crate) fn ngram_words(&self, n: usize, id: u32, words: &mut Vec<u32>) {
        words.clear();
        let mut level = n;
        let mut id = id;
        while level > 1 {
            let entries = &self.orders[level - 1];
            words.push(entries.word[id as usize]);
            id = entries.prefix[id as usize];
            level -= 1;
        }
        words.push(id);
        words.reverse();
    }

    /// `(log10 P, log10 back-off)` of entry `id` of order `n`.
    pub(crate) fn entry_values(&self, n: usize, id: u32) -> (f64, f64) {
        let entries = &self.orders[n - 1];
        (
            entries.log10_prob[id as usize],
            entries.log10_backoff[id as usize],
        )
    }

    /// The words of the vocabulary as strings, in index order.
    pub(crate) fn words(&self) -> &[String] {
        &self.words
    }
}

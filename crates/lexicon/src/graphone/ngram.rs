//! The n-gram over graphone sequences: the [`GraphoneLm`] interface the decoder scores with, and
//! [`BackoffNgram`], an interpolated modified Kneser-Ney model (Chen & Goodman 1998) stored in
//! back-off form. It follows the project's LM conventions (DESIGN.md): one `<s>` as context
//! only, `</s>` predicted, the highest order on raw counts, lower orders on continuation counts
//! except n-grams that begin with `<s>`, discounts D1, D2, D3+ per order from count-of-counts,
//! unigrams interpolated with the uniform distribution. The vocabulary is closed (the graphone
//! inventory plus `</s>`), so there is no `<unk>`.

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};

/// Longest n-gram order the model stores.
pub const MAX_ORDER: usize = 8;

/// Marks unused tail positions of an n-gram key.
const EMPTY: u32 = u32::MAX;

/// A token id: graphone ids are `0..graphones`, then `</s>`, then `<s>`.
pub type TokenId = u32;

/// An n-gram padded to [`MAX_ORDER`] with [`EMPTY`]; sorting keys groups n-grams by context.
type Key = [u32; MAX_ORDER];

/// A multiply-rotate hasher for small integer keys: n-gram look-ups dominate decoding time, and
/// the keys come from our own model, not from an adversary, so a keyed hash buys nothing here.
#[derive(Default, Clone, Copy)]
pub struct TokenHasher(u64);

impl Hasher for TokenHasher {
    fn write(&mut self, bytes: &[u8]) {
        for chunk in bytes.chunks(8) {
            let mut word = [0u8; 8];
            word[..chunk.len()].copy_from_slice(chunk);
            self.write_u64(u64::from_le_bytes(word));
        }
    }

    fn write_u64(&mut self, n: u64) {
        self.0 = (self.0.rotate_left(5) ^ n).wrapping_mul(0x51_7c_c1_b7_27_22_0a_95);
    }

    fn write_u32(&mut self, n: u32) {
        self.write_u64(u64::from(n));
    }

    fn write_usize(&mut self, n: usize) {
        self.write_u64(n as u64);
    }

    fn finish(&self) -> u64 {
        self.0
    }
}

/// A hash map keyed by token ids with [`TokenHasher`].
pub type TokenMap<K, V> = HashMap<K, V, BuildHasherDefault<TokenHasher>>;

/// What the decoder needs from a graphone n-gram: scores are log10 probabilities.
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

/// A history of up to `MAX_ORDER - 1` tokens, most recent last, already shortened to the longest
/// suffix the model knows (so equal futures have equal states).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Context {
    tokens: [u32; MAX_ORDER - 1],
    len: u8,
}

impl Context {
    fn as_slice(&self) -> &[u32] {
        &self.tokens[..self.len as usize]
    }
}

fn key_of(tokens: &[u32]) -> Key {
    let mut key = [EMPTY; MAX_ORDER];
    key[..tokens.len()].copy_from_slice(tokens);
    key
}

fn key_len(key: &Key) -> usize {
    key.iter().position(|&t| t == EMPTY).unwrap_or(MAX_ORDER)
}

/// A back-off n-gram: for every stored n-gram its log10 probability and (when it is a context
/// of a longer n-gram) its log10 back-off weight.
#[derive(Debug, Clone, PartialEq)]
pub struct BackoffNgram {
    order: usize,
    /// Number of predictable tokens: graphones and `</s>`.
    vocabulary: u32,
    /// `tables[n - 1]` holds the n-grams of order n.
    tables: Vec<TokenMap<Key, (f32, f32)>>,
}

/// Count-of-counts discounts D1, D2, D3+ for one order (Chen & Goodman 1998, eq. 26).
fn discounts(counts: impl Iterator<Item = u64>) -> [f64; 3] {
    let mut n = [0u64; 5];
    for count in counts {
        if (1..=4).contains(&count) {
            n[count as usize] += 1;
        }
    }
    let [_, n1, n2, n3, n4] = n.map(|c| c as f64);
    let y = n1 / (n1 + 2.0 * n2);
    let modified = [
        1.0 - 2.0 * y * n2 / n1,
        2.0 - 3.0 * y * n3 / n2,
        3.0 - 4.0 * y * n4 / n3,
    ];
    let valid = modified
        .iter()
        .enumerate()
        .all(|(k, d)| d.is_finite() && *d > 0.0 && *d < (k + 1) as f64);
    if valid {
        modified
    } else if y.is_finite() && y > 0.0 && y < 1.0 {
        // Too few data for three discounts (tiny dictionaries): one absolute discount.
        [y; 3]
    } else {
        [0.5; 3]
    }
}

impl BackoffNgram {
    /// Estimates an interpolated modified Kneser-Ney model of `order` from token sequences
    /// (graphone ids below `vocabulary - 1`; `</s>` is `vocabulary - 1`, `<s>` is `vocabulary`).
    /// Each sequence is one word without `<s>`/`</s>`; they are added here.
    pub fn estimate(sequences: &[Vec<TokenId>], vocabulary: u32, order: usize) -> BackoffNgram {
        let order = order.clamp(1, MAX_ORDER);
        let end = vocabulary - 1;
        let start = vocabulary;
        let mut raw: Vec<TokenMap<Key, u64>> = vec![TokenMap::default(); order];
        for sequence in sequences {
            let mut tokens = Vec::with_capacity(sequence.len() + 2);
            tokens.push(start);
            tokens.extend_from_slice(sequence);
            tokens.push(end);
            for last in 1..tokens.len() {
                for n in 1..=order.min(last + 1) {
                    *raw[n - 1]
                        .entry(key_of(&tokens[last + 1 - n..=last]))
                        .or_default() += 1;
                }
            }
        }
        // Adjusted counts: raw at the highest order and for n-grams starting with <s>,
        // otherwise the number of distinct one-token left extensions.
        let mut adjusted: Vec<Vec<(Key, u64)>> = Vec::with_capacity(order);
        for n in 1..=order {
            let mut counts: TokenMap<Key, u64> = TokenMap::default();
            if n == order {
                counts = raw[n - 1].clone();
            } else {
                for key in raw[n - 1].keys().filter(|k| k[0] == start) {
                    counts.insert(*key, raw[n - 1][key]);
                }
                for key in raw[n].keys() {
                    let suffix = key_of(&key[1..=n]);
                    if suffix[0] != start {
                        *counts.entry(suffix).or_default() += 1;
                    }
                }
            }
            let mut sorted: Vec<(Key, u64)> = counts.into_iter().collect();
            sorted.sort_unstable_by_key(|entry| entry.0);
            adjusted.push(sorted);
        }
        let mut tables: Vec<TokenMap<Key, (f32, f32)>> = Vec::with_capacity(order);
        // Interpolated probabilities (natural scale) of the previous order, for the recursion.
        let mut lower: TokenMap<Key, f64> = TokenMap::default();
        let mut gammas_by_order: Vec<TokenMap<Key, f64>> = Vec::with_capacity(order);
        for n in 1..=order {
            let counts = &adjusted[n - 1];
            let d = discounts(counts.iter().map(|(_, c)| *c));
            let discount = |c: u64| d[(c.min(3) - 1) as usize];
            let mut probabilities: TokenMap<Key, f64> = TokenMap::default();
            let mut gammas: TokenMap<Key, f64> = TokenMap::default();
            let mut group_start = 0;
            while group_start < counts.len() {
                let context = &counts[group_start].0[..n - 1];
                let mut group_end = group_start;
                while group_end < counts.len() && &counts[group_end].0[..n - 1] == context {
                    group_end += 1;
                }
                let group = &counts[group_start..group_end];
                let total: f64 = group.iter().map(|(_, c)| *c as f64).sum();
                let discounted: f64 = group.iter().map(|(_, c)| discount(*c)).sum();
                let gamma = discounted / total;
                for (key, count) in group {
                    let lower_probability = if n == 1 {
                        1.0 / f64::from(vocabulary)
                    } else {
                        lower[&key_of(&key[1..n])]
                    };
                    let p = (*count as f64 - discount(*count)) / total + gamma * lower_probability;
                    probabilities.insert(*key, p);
                }
                if n > 1 {
                    gammas.insert(key_of(context), gamma);
                } else {
                    gammas.insert(key_of(&[]), gamma);
                }
                group_start = group_end;
            }
            gammas_by_order.push(gammas);
            tables.push(
                probabilities
                    .iter()
                    .map(|(key, p)| (*key, (p.log10() as f32, 0.0)))
                    .collect(),
            );
            lower = probabilities;
        }
        // In an interpolated model the back-off weight of a context is exactly its gamma.
        for n in 2..=order {
            for (context, gamma) in &gammas_by_order[n - 1] {
                if let Some(entry) = tables[n - 2].get_mut(context) {
                    entry.1 = gamma.log10() as f32;
                }
            }
        }
        BackoffNgram {
            order,
            vocabulary,
            tables,
        }
    }

    /// The model's order.
    pub fn order(&self) -> usize {
        self.order
    }

    /// Number of predictable tokens (graphones and `</s>`).
    pub fn vocabulary(&self) -> u32 {
        self.vocabulary
    }

    /// All stored n-grams of order `n` as `(tokens, log10 p, log10 back-off)`, sorted by tokens
    /// (for writing a model file deterministically).
    pub fn ngrams(&self, n: usize) -> Vec<(Vec<TokenId>, f32, f32)> {
        let mut rows: Vec<(Vec<TokenId>, f32, f32)> = self.tables[n - 1]
            .iter()
            .map(|(key, (p, b))| (key[..key_len(key)].to_vec(), *p, *b))
            .collect();
        rows.sort_by(|a, b| a.0.cmp(&b.0));
        rows
    }

    /// Rebuilds a model from stored n-grams (as [`BackoffNgram::ngrams`] lists them).
    pub fn from_ngrams(
        order: usize,
        vocabulary: u32,
        ngrams: impl IntoIterator<Item = (Vec<TokenId>, f32, f32)>,
    ) -> Option<BackoffNgram> {
        if order == 0 || order > MAX_ORDER {
            return None;
        }
        let mut tables = vec![TokenMap::default(); order];
        for (tokens, p, b) in ngrams {
            if tokens.is_empty() || tokens.len() > order {
                return None;
            }
            tables[tokens.len() - 1].insert(key_of(&tokens), (p, b));
        }
        Some(BackoffNgram {
            order,
            vocabulary,
            tables,
        })
    }

    /// The longest suffix of `history` that is stored as an n-gram (a usable context).
    fn shorten(&self, history: &[u32]) -> Context {
        let keep = history.len().min(self.order - 1);
        let mut history = &history[history.len() - keep..];
        while !history.is_empty() && !self.tables[history.len() - 1].contains_key(&key_of(history))
        {
            history = &history[1..];
        }
        let mut tokens = [EMPTY; MAX_ORDER - 1];
        tokens[..history.len()].copy_from_slice(history);
        Context {
            tokens,
            len: history.len() as u8,
        }
    }

    /// log10 P(token | context) by backing off to shorter contexts.
    fn probability(&self, context: &[u32], token: u32) -> f32 {
        let mut backoff = 0.0;
        let mut key = [EMPTY; MAX_ORDER];
        for used in (0..=context.len()).rev() {
            let suffix = &context[context.len() - used..];
            key[..used].copy_from_slice(suffix);
            key[used] = token;
            key[used + 1..].fill(EMPTY);
            if let Some((p, _)) = self.tables[used].get(&key) {
                return backoff + p;
            }
            if used > 0 {
                if let Some((_, b)) = self.tables[used - 1].get(&key_of(suffix)) {
                    backoff += b;
                }
            }
        }
        // Only tokens outside the vocabulary get here; the decoder never asks for them.
        f32::NEG_INFINITY
    }
}

impl GraphoneLm for BackoffNgram {
    type State = Context;

    fn start(&self) -> Context {
        self.shorten(&[self.vocabulary])
    }

    fn score(&self, state: &Context, graphone: TokenId) -> (f32, Context) {
        let p = self.probability(state.as_slice(), graphone);
        let mut history = [EMPTY; MAX_ORDER];
        let len = state.len as usize;
        history[..len].copy_from_slice(state.as_slice());
        history[len] = graphone;
        (p, self.shorten(&history[..=len]))
    }

    fn end(&self, state: &Context) -> f32 {
        self.probability(state.as_slice(), self.vocabulary - 1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn toy() -> Vec<Vec<TokenId>> {
        vec![
            vec![0, 1, 2],
            vec![0, 1],
            vec![1, 2, 2],
            vec![2, 0, 1, 1],
            vec![0],
            vec![0, 2],
        ]
    }

    /// Every context's distribution over the vocabulary sums to one (the textbook check for a
    /// smoothed model).
    #[test]
    fn distributions_sum_to_one() {
        let vocabulary = 4; // graphones 0, 1, 2 and </s>
        for order in 1..=4 {
            let model = BackoffNgram::estimate(&toy(), vocabulary, order);
            let mut states = vec![model.start()];
            for first in 0..3 {
                let (_, s) = model.score(&model.start(), first);
                states.push(s);
                for second in 0..3 {
                    states.push(model.score(&s, second).1);
                }
            }
            for state in states {
                let total: f64 = (0..3)
                    .map(|t| 10f64.powf(f64::from(model.score(&state, t).0)))
                    .sum::<f64>()
                    + 10f64.powf(f64::from(model.end(&state)));
                assert!((total - 1.0).abs() < 1e-5, "order {order}: {total}");
            }
        }
    }

    /// A hand-worked bigram: counts <s>0:4 <s>1:1 <s>2:1, and so on; with the continuation
    /// unigram counts of the toy data the bigram P(1 | 0) follows the interpolated formula.
    #[test]
    fn bigram_matches_the_interpolated_kneser_ney_formula() {
        let model = BackoffNgram::estimate(&toy(), 4, 2);
        // Bigram counts with context 0: (0,1)=3, (0,2)=1, (0,</s>)=1 → total 5.
        // Order-2 count-of-counts: n1 and n2 decide D; recompute them here independently.
        let data = toy();
        let mut bigrams: HashMap<(u32, u32), u64> = HashMap::new();
        for s in &data {
            let mut t = vec![4];
            t.extend(s);
            t.push(3);
            for w in t.windows(2) {
                *bigrams.entry((w[0], w[1])).or_default() += 1;
            }
        }
        let count = |c: u64| bigrams.values().filter(|&&v| v == c).count() as f64;
        let (n1, n2, n3, n4) = (count(1), count(2), count(3), count(4));
        let y = n1 / (n1 + 2.0 * n2);
        let d = [
            1.0 - 2.0 * y * n2 / n1,
            2.0 - 3.0 * y * n3 / n2,
            3.0 - 4.0 * y * n4 / n3,
        ];
        // Continuation unigram counts (distinct left neighbours, <s> included as a neighbour).
        let mut left: HashMap<u32, std::collections::HashSet<u32>> = HashMap::new();
        for (a, b) in bigrams.keys() {
            left.entry(*b).or_default().insert(*a);
        }
        let unigram_counts: Vec<(u32, u64)> = (0..4).map(|w| (w, left[&w].len() as u64)).collect();
        let total_unigram: f64 = unigram_counts.iter().map(|(_, c)| *c as f64).sum();
        let discount1 = discounts(unigram_counts.iter().map(|(_, c)| *c));
        let dis = |c: u64, d: &[f64; 3]| d[(c.min(3) - 1) as usize];
        let gamma1: f64 = unigram_counts
            .iter()
            .map(|(_, c)| dis(*c, &discount1))
            .sum::<f64>()
            / total_unigram;
        let p1 = |w: u32| {
            let c = unigram_counts[w as usize].1;
            (c as f64 - dis(c, &discount1)) / total_unigram + gamma1 / 4.0
        };
        let context: Vec<(u32, u64)> = (0..4)
            .filter_map(|w| bigrams.get(&(0, w)).map(|c| (w, *c)))
            .collect();
        let total: f64 = context.iter().map(|(_, c)| *c as f64).sum();
        let gamma: f64 = context.iter().map(|(_, c)| dis(*c, &d)).sum::<f64>() / total;
        let c01 = bigrams[&(0, 1)];
        let expected = (c01 as f64 - dis(c01, &d)) / total + gamma * p1(1);
        let (_, after_zero) = model.score(&model.start(), 0);
        let (got, _) = model.score(&after_zero, 1);
        assert!(
            (f64::from(got) - expected.log10()).abs() < 1e-5,
            "{got} vs {}",
            expected.log10()
        );
    }

    #[test]
    fn stored_ngrams_round_trip() {
        let model = BackoffNgram::estimate(&toy(), 4, 3);
        let rows: Vec<_> = (1..=3).flat_map(|n| model.ngrams(n)).collect();
        let copy = BackoffNgram::from_ngrams(3, 4, rows).unwrap();
        assert_eq!(copy, model);
    }
}

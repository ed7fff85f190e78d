//! CTC prefix beam search with a lexicon trie and a word-level language model.
//!
//! A hypothesis is a node of a prefix tree (an arena that grows during one utterance): the
//! emitted labels, the words completed so far with their LM state and summed LM score, and the
//! position in the lexicon trie. For every hypothesis the search keeps two probabilities: of all
//! alignments of its labels to the frames so far that end in blank, and that end in its last
//! label (Graves & Jaitly 2014; Hannun et al. 2014). Two hypotheses with the same labels but
//! different word segmentations (phone lexicons) or different homophones stay separate, so with an
//! unlimited beam the search maximises exactly
//!
//! `ln P(labels | posteriors) + lm_weight × ln P_LM(words, </s>) + word_bonus × |words|`
//!
//! over all (labels, words) pairs where the words spell the labels by the graph's [`WordRule`].

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};
use std::sync::Arc;

use ndarray::ArrayView2;

use isogloss_lexicon::trie::TrieNode;

use crate::graph::{SearchGraph, WordRule};
use crate::lm::LanguageModel;
use crate::transcript::{spell, timed_words, viterbi_runs, LabelRun, Transcript, WordSpan};
use crate::{check_posteriors, DecodeError, Decoder};

/// The default LM weight of every command and of the sweep file. It is the pair measured best
/// on the demo corpus's dev split (coordinate search over LM weights 0.4–1.5 and word bonuses
/// 0–3 with the demo model, the in-domain trigram and the grapheme lexicon; README), the only
/// tuning measured so far. Tune it on your own dev set (`isogloss sweep` with `tune`).
pub const DEFAULT_LM_WEIGHT: f32 = 1.2;
/// The default word bonus, chosen together with [`DEFAULT_LM_WEIGHT`].
pub const DEFAULT_WORD_BONUS: f32 = 0.5;

/// The default beam of every command and of the sweep file: hypotheses kept after each frame.
/// Wider beams only remove search errors and cost time. On clean familiar voices 16 already
/// reads as well as 1 024 does; on unfamiliar voices and degraded channels, where the
/// posteriors are flat and many spellings compete, the WER with the LM kept falling up to the
/// widest beam measured (README, "The beam width": 5–7 points from 16 to 256 on the demo's
/// noisy and reverberant `cross` rows). 256 is the widest power of two that kept
/// transcription at or below half the speed goal (RTF 0.005 per core, warp search included)
/// on every demo split with the shipped model's bf16 products; with f32 products (CPUs
/// without AVX-512 BF16) the shipped eight-layer model's short degraded clips take 0.008–0.009
/// (the six-layer model before it: 0.010–0.011, 0.009 at 128).
pub const DEFAULT_BEAM: usize = 256;

/// Tuning of the prefix beam search. Every pruning option trades accuracy for speed; with
/// [`SearchOptions::exact`] nothing is pruned.
#[derive(Debug, Clone, PartialEq)]
pub struct SearchOptions {
    /// Hypotheses kept after each frame.
    pub beam: usize,
    /// Factor on the LM's natural-log probabilities.
    pub lm_weight: f32,
    /// Added to the score for every word (counteracts the LM's preference for short outputs).
    pub word_bonus: f32,
    /// A frame only extends hypotheses by units whose log posterior is within this margin of
    /// the frame's best non-blank unit; `None` tries every unit.
    pub unit_margin: Option<f32>,
    /// Hypotheses more than this below the frame's best are dropped; `None` keeps the beam full.
    pub score_margin: Option<f32>,
    /// Frames whose blank posterior is at least this probability only update existing
    /// hypotheses (blank and repeat), without extending any; `None` treats every frame fully.
    pub skip_blank_above: Option<f32>,
    /// Rank partial words by the best LM look-ahead score in the lexicon trie below them.
    pub lookahead: bool,
    /// `ln P` charged for a word the LM neither knows nor can map to `<unk>`.
    pub unknown_word_score: f32,
}

impl Default for SearchOptions {
    fn default() -> Self {
        SearchOptions {
            beam: DEFAULT_BEAM,
            lm_weight: DEFAULT_LM_WEIGHT,
            word_bonus: DEFAULT_WORD_BONUS,
            unit_margin: Some(8.0),
            score_margin: Some(20.0),
            skip_blank_above: Some(0.999),
            lookahead: true,
            unknown_word_score: -20.0,
        }
    }
}

/// Widest beam that can be asked for: far beyond where wider beams stop changing the result,
/// and small enough that an unpruned beam stays in memory.
pub const MAX_BEAM: usize = 4096;

impl SearchOptions {
    /// Checks every setting: a beam of 1 to [`MAX_BEAM`], finite weights, positive finite
    /// margins, `skip_blank_above` within [0, 1]. The error names the setting.
    pub fn validate(&self) -> Result<(), crate::DecodeError> {
        let invalid = |setting: &'static str, expected: &str, found: String| {
            Err(crate::DecodeError::InvalidSetting {
                setting,
                expected: expected.to_string(),
                found,
            })
        };
        if !(1..=MAX_BEAM).contains(&self.beam) {
            return invalid("beam", "from 1 to 4096", self.beam.to_string());
        }
        for (setting, value) in [
            ("lm_weight", self.lm_weight),
            ("word_bonus", self.word_bonus),
            ("unknown_word_score", self.unknown_word_score),
        ] {
            if !value.is_finite() {
                return invalid(setting, "a finite number", value.to_string());
            }
        }
        for (setting, value) in [
            ("unit_margin", self.unit_margin),
            ("score_margin", self.score_margin),
        ] {
            if let Some(value) = value.filter(|v| !(v.is_finite() && *v > 0.0)) {
                return invalid(setting, "a positive finite number", value.to_string());
            }
        }
        if let Some(value) = self.skip_blank_above.filter(|v| !(0.0..=1.0).contains(v)) {
            return invalid("skip_blank_above", "from 0 to 1", value.to_string());
        }
        Ok(())
    }

    /// No pruning at all: every hypothesis is kept. Exponential in the number of frames; meant
    /// for checking the search against enumeration on tiny inputs.
    pub fn exact(lm_weight: f32, word_bonus: f32) -> Self {
        SearchOptions {
            beam: usize::MAX,
            lm_weight,
            word_bonus,
            unit_margin: None,
            score_margin: None,
            skip_blank_above: None,
            lookahead: true,
            unknown_word_score: -20.0,
        }
    }
}

const NONE: u32 = u32::MAX;
/// Arena size below which compaction is not worth its pass (tiny under test, so that every
/// check of the search also runs through compaction). Smaller arenas keep the children map
/// small enough to stay in cache: transcribing the demo's noisy `cross` clips at beam 1 024 on
/// one thread took 4.7–5.1 s of CPU with 2^14 against 5.2–5.7 s with 2^16 (2^12, 2^13 and
/// 2^15 in between; two sets of three interleaved rounds, identical transcripts; at beam 256
/// within the noise).
const MIN_COMPACT: usize = if cfg!(test) { 64 } else { 1 << 14 };
/// Word code: the step completes no word.
const NO_WORD: u32 = u32::MAX;
/// Word code: the step completes a word spelled from units (no lexicon).
const SPELLED: u32 = u32::MAX - 1;

#[derive(Debug, Clone)]
struct PrefixNode<S> {
    parent: u32,
    /// Label emitted by this step (0 only at the root).
    unit: u32,
    /// Word completed by this step: a lexicon word id, [`SPELLED`] or [`NO_WORD`].
    word: u32,
    /// Position in the lexicon trie after this step (the root between words).
    trie: TrieNode,
    /// Units in the current, unfinished spelled word.
    word_len: u32,
    lm_state: S,
    /// `lm_weight × Σ ln P_LM + word_bonus × words` of the completed words.
    context: f32,
    /// `lm_weight × look-ahead` of the unfinished word; ranking only.
    lookahead: f32,
    /// Step stamp and index of this node in the beam being built (avoids a hash map).
    stamp: u32,
    slot: u32,
}

#[derive(Debug, Clone, Copy)]
struct Hypothesis {
    node: u32,
    blank: f32,
    non_blank: f32,
    /// Ranking score, set by pruning.
    rank: f32,
}

/// A multiply-rotate hasher for small integer keys (arena ids, unit ids): the keys are not
/// adversarial, and the standard SipHash costs more than the lookup it serves.
#[derive(Default)]
struct IdHasher(u64);

impl Hasher for IdHasher {
    fn finish(&self) -> u64 {
        // The multiply leaves the low bits poorly mixed, and the table indexes by them.
        let x = self.0 ^ (self.0 >> 32);
        x ^ (x >> 17)
    }

    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.write_u32(u32::from(b));
        }
    }

    fn write_u32(&mut self, value: u32) {
        self.0 = (self.0.rotate_left(5) ^ u64::from(value)).wrapping_mul(0x517c_c1b7_2722_0a95);
    }
}

#[inline]
fn log_add(a: f32, b: f32) -> f32 {
    if a == f32::NEG_INFINITY {
        return b;
    }
    if b == f32::NEG_INFINITY {
        return a;
    }
    let (hi, lo) = if a > b { (a, b) } else { (b, a) };
    hi + (lo - hi).exp().ln_1p()
}

/// A finished hypothesis: its node, the word still pending at the end (boundary rules), and
/// its objective.
struct Final {
    node: u32,
    pending: u32,
    acoustic: f32,
    score: f32,
}

/// CTC prefix beam search over one [`SearchGraph`] and one [`LanguageModel`]. Holds its scratch
/// buffers, so one instance per thread decodes any number of utterances without reallocating
/// once the buffers have grown.
pub struct PrefixBeamSearch<'a, L: LanguageModel> {
    graph: &'a SearchGraph,
    lm: &'a L,
    options: SearchOptions,
    /// LM handle for each lexicon word id (`None`: unknown to the LM); shared by clones.
    lm_words: Arc<[Option<L::Word>]>,
    /// `lm_weight × look-ahead` per trie node; shared by clones.
    lookahead: Arc<[f32]>,
    /// Arena size that triggers the next compaction.
    compact_at: usize,
    arena: Vec<PrefixNode<L::State>>,
    /// `(parent, unit, word code)` → arena node.
    children: HashMap<(u32, u32, u32), u32, BuildHasherDefault<IdHasher>>,
    beam: Vec<Hypothesis>,
    next: Vec<Hypothesis>,
    candidates: Vec<u32>,
    is_candidate: Vec<bool>,
    frame: Vec<f32>,
    stamp: u32,
    text: String,
    units: Vec<u32>,
    viterbi_scores: Vec<f32>,
    viterbi_back: Vec<u8>,
    runs: Vec<LabelRun>,
}

impl<'a, L: LanguageModel> Clone for PrefixBeamSearch<'a, L> {
    fn clone(&self) -> Self {
        PrefixBeamSearch::with_tables(
            self.graph,
            self.lm,
            self.options.clone(),
            Arc::clone(&self.lm_words),
            Arc::clone(&self.lookahead),
        )
    }
}

impl<'a, L: LanguageModel> PrefixBeamSearch<'a, L> {
    /// Prepares a search: maps the lexicon's words to LM words (falling back to the LM's
    /// `<unk>`) and computes the trie look-ahead scores.
    pub fn new(graph: &'a SearchGraph, lm: &'a L, options: SearchOptions) -> Self {
        let lm_words: Vec<Option<L::Word>> = graph
            .words()
            .iter()
            .map(|w| lm.lookup(w).or_else(|| lm.unknown()))
            .collect();
        let mut lookahead: Vec<f32> = Vec::new();
        if let Some(trie) = graph.trie() {
            // The graph's trie is shared by every search; fill a private copy's slots with this
            // search's weighted scores and keep them as a plain table by node index.
            let mut trie = trie.clone();
            let weight = options.lm_weight;
            let unknown = options.unknown_word_score;
            if options.lookahead {
                trie.fill_lookahead(|w| match lm_words[w as usize] {
                    Some(word) => weight * lm.lookahead_score(word),
                    None => weight * unknown,
                });
            }
            lookahead = trie
                .nodes()
                .map(|n| {
                    if options.lookahead {
                        trie.lookahead(n)
                    } else {
                        0.0
                    }
                })
                .collect();
        }
        PrefixBeamSearch::with_tables(graph, lm, options, lm_words.into(), lookahead.into())
    }

    /// A search over prepared word and look-ahead tables, with empty scratch buffers (they
    /// grow on first use and are then reused).
    fn with_tables(
        graph: &'a SearchGraph,
        lm: &'a L,
        options: SearchOptions,
        lm_words: Arc<[Option<L::Word>]>,
        lookahead: Arc<[f32]>,
    ) -> Self {
        PrefixBeamSearch {
            graph,
            lm,
            options,
            lm_words,
            lookahead,
            compact_at: MIN_COMPACT,
            arena: Vec::new(),
            children: HashMap::default(),
            beam: Vec::new(),
            next: Vec::new(),
            candidates: Vec::new(),
            is_candidate: Vec::new(),
            frame: Vec::new(),
            stamp: 0,
            text: String::new(),
            units: Vec::new(),
            viterbi_scores: Vec::new(),
            viterbi_back: Vec::new(),
            runs: Vec::new(),
        }
    }

    /// The options this search runs with.
    pub fn options(&self) -> &SearchOptions {
        &self.options
    }

    /// The `n` best finished hypotheses, best first (fewer if fewer survive). Every hypothesis
    /// obeys the graph's word rule: with a lexicon, only lexicon words.
    pub fn decode_nbest(
        &mut self,
        log_posteriors: ArrayView2<'_, f32>,
        n: usize,
    ) -> Result<Vec<Transcript>, DecodeError> {
        check_posteriors(self.graph, log_posteriors)?;
        self.reset();
        let skip_blank_above = self.options.skip_blank_above.map(|p| p.ln());
        for t in 0..log_posteriors.nrows() {
            // Copy the row: the posteriors may be a strided view; the copy reuses one buffer.
            let mut frame = std::mem::take(&mut self.frame);
            frame.clear();
            frame.extend(log_posteriors.row(t).iter().copied());
            match skip_blank_above {
                Some(threshold) if frame[0] >= threshold => self.blank_step(&frame),
                _ => self.full_step(&frame),
            }
            self.frame = frame;
        }
        let mut finals = self.finals();
        finals.sort_by(|a, b| b.score.total_cmp(&a.score));
        finals.truncate(n);
        Ok(finals
            .iter()
            .map(|f| self.transcript(log_posteriors, f))
            .collect())
    }

    fn reset(&mut self) {
        self.arena.clear();
        self.children.clear();
        self.beam.clear();
        self.next.clear();
        let root_trie = self
            .graph
            .trie()
            .map(|t| t.root())
            .unwrap_or_else(|| isogloss_lexicon::trie::PrefixTrie::default().root());
        self.arena.push(PrefixNode {
            parent: NONE,
            unit: 0,
            word: NO_WORD,
            trie: root_trie,
            word_len: 0,
            lm_state: self.lm.start_state(),
            context: 0.0,
            lookahead: 0.0,
            stamp: 0,
            slot: 0,
        });
        self.beam.push(Hypothesis {
            node: 0,
            blank: 0.0,
            non_blank: f32::NEG_INFINITY,
            rank: 0.0,
        });
        self.stamp = 0;
        self.compact_at = MIN_COMPACT;
    }

    /// A frame where blank dominates: hypotheses only absorb it by blank or by repeating their
    /// last label; no new prefix is started.
    fn blank_step(&mut self, frame: &[f32]) {
        for h in &mut self.beam {
            let last = self.arena[h.node as usize].unit as usize;
            let total = log_add(h.blank, h.non_blank);
            h.blank = total + frame[0];
            h.non_blank = if last == 0 {
                f32::NEG_INFINITY
            } else {
                h.non_blank + frame[last]
            };
        }
    }

    fn full_step(&mut self, frame: &[f32]) {
        self.stamp += 1;
        self.next.clear();
        self.candidates.clear();
        self.is_candidate.clear();
        self.is_candidate.resize(frame.len(), false);
        let best_unit = frame[1..].iter().copied().fold(f32::NEG_INFINITY, f32::max);
        for (c, &p) in frame.iter().enumerate().skip(1) {
            if self.options.unit_margin.is_none_or(|m| p >= best_unit - m) {
                self.candidates.push(c as u32);
                self.is_candidate[c] = true;
            }
        }
        let graph = self.graph;
        let boundary = graph.boundary();
        for i in 0..self.beam.len() {
            let h = self.beam[i];
            let total = log_add(h.blank, h.non_blank);
            self.add(h.node, total + frame[0], f32::NEG_INFINITY);
            let last = self.arena[h.node as usize].unit;
            if last != 0 {
                self.add(
                    h.node,
                    f32::NEG_INFINITY,
                    h.non_blank + frame[last as usize],
                );
            }
            // `next`: the trie node `c` leads to from the hypothesis's, when already known.
            let try_unit = |search: &mut Self, c: u32, next: Option<TrieNode>| {
                let from = if c == last { h.blank } else { total };
                if from != f32::NEG_INFINITY {
                    search.extend(h.node, c, from + frame[c as usize], next);
                }
            };
            match graph.trie() {
                // With a lexicon only the trie node's children (and the boundary) can follow:
                // walk those instead of every candidate unit.
                Some(trie) => {
                    let at = self.arena[h.node as usize].trie;
                    for &(c, next) in trie.children(at) {
                        if self.is_candidate[c as usize] {
                            try_unit(self, c, Some(next));
                        }
                    }
                    if let Some(b) = boundary.filter(|&b| self.is_candidate[b as usize]) {
                        try_unit(self, b, None);
                    }
                }
                None => {
                    for k in 0..self.candidates.len() {
                        let c = self.candidates[k];
                        try_unit(self, c, None);
                    }
                }
            }
        }
        self.prune();
        std::mem::swap(&mut self.beam, &mut self.next);
        if self.arena.len() >= self.compact_at {
            self.compact();
        }
    }

    /// Drops the arena nodes no surviving hypothesis descends from. A dropped prefix that comes
    /// back later is rebuilt identically (its LM state and context depend only on its path), so
    /// this changes memory, not results. Parents precede children in the arena, so one forward
    /// pass renumbers everything.
    fn compact(&mut self) {
        let mut keep = vec![false; self.arena.len()];
        keep[0] = true;
        for h in &self.beam {
            let mut n = h.node;
            while n != NONE && !keep[n as usize] {
                keep[n as usize] = true;
                n = self.arena[n as usize].parent;
            }
        }
        let mut renumber = vec![NONE; self.arena.len()];
        let mut kept = 0usize;
        for i in 0..self.arena.len() {
            if !keep[i] {
                continue;
            }
            renumber[i] = kept as u32;
            let mut node = self.arena[i].clone();
            if node.parent != NONE {
                node.parent = renumber[node.parent as usize];
            }
            node.stamp = 0;
            self.arena[kept] = node;
            kept += 1;
        }
        self.arena.truncate(kept);
        self.children.clear();
        for (i, node) in self.arena.iter().enumerate().skip(1) {
            self.children
                .insert((node.parent, node.unit, node.word), i as u32);
        }
        for h in &mut self.beam {
            h.node = renumber[h.node as usize];
        }
        self.compact_at = (4 * kept).max(MIN_COMPACT);
    }

    fn prune(&mut self) {
        // Rank once per hypothesis: the comparisons below would otherwise redo the log-add.
        let mut best = f32::NEG_INFINITY;
        for h in &mut self.next {
            let node = &self.arena[h.node as usize];
            h.rank = log_add(h.blank, h.non_blank) + node.context + node.lookahead;
            best = best.max(h.rank);
        }
        if let Some(margin) = self.options.score_margin {
            self.next.retain(|h| h.rank >= best - margin);
        }
        if self.next.len() > self.options.beam {
            let beam = self.options.beam;
            self.next
                .select_nth_unstable_by(beam - 1, |a, b| b.rank.total_cmp(&a.rank));
            self.next.truncate(beam);
        }
    }

    /// Adds probability mass to `node` in the beam being built.
    fn add(&mut self, node: u32, blank: f32, non_blank: f32) {
        let entry = &mut self.arena[node as usize];
        if entry.stamp == self.stamp {
            let h = &mut self.next[entry.slot as usize];
            h.blank = log_add(h.blank, blank);
            h.non_blank = log_add(h.non_blank, non_blank);
        } else {
            entry.stamp = self.stamp;
            entry.slot = self.next.len() as u32;
            self.next.push(Hypothesis {
                node,
                blank,
                non_blank,
                rank: 0.0,
            });
        }
    }

    /// Extends `parent` by label `unit` with probability `p`, into every continuation the word
    /// rule allows. `next`, when given, is the trie node `unit` leads to from `parent`'s (saves
    /// looking it up again).
    fn extend(&mut self, parent: u32, unit: u32, p: f32, next: Option<TrieNode>) {
        let graph = self.graph;
        let node = &self.arena[parent as usize];
        let is_boundary = Some(unit) == graph.boundary();
        match graph.word_rule() {
            WordRule::LexiconAtWordEnd => {
                let Some(trie) = graph.trie() else { return };
                let Some(child) = next.or_else(|| trie.child(node.trie, unit)) else {
                    return;
                };
                if !trie.children(child).is_empty() {
                    let target = self.child(parent, unit, NO_WORD, Some(child));
                    self.add(target, f32::NEG_INFINITY, p);
                }
                for &word in trie.words_at(child) {
                    let target = self.child(parent, unit, word, None);
                    self.add(target, f32::NEG_INFINITY, p);
                }
            }
            WordRule::LexiconAtBoundary => {
                let Some(trie) = graph.trie() else { return };
                if is_boundary {
                    if node.trie == trie.root() {
                        let target = self.child(parent, unit, NO_WORD, None);
                        self.add(target, f32::NEG_INFINITY, p);
                    } else {
                        let at = node.trie;
                        for &word in trie.words_at(at) {
                            let target = self.child(parent, unit, word, None);
                            self.add(target, f32::NEG_INFINITY, p);
                        }
                    }
                } else if let Some(child) = next.or_else(|| trie.child(node.trie, unit)) {
                    let target = self.child(parent, unit, NO_WORD, Some(child));
                    self.add(target, f32::NEG_INFINITY, p);
                }
            }
            WordRule::SpelledAtBoundary => {
                let word = if is_boundary && node.word_len > 0 {
                    SPELLED
                } else {
                    NO_WORD
                };
                let target = self.child(parent, unit, word, None);
                self.add(target, f32::NEG_INFINITY, p);
            }
            WordRule::EveryUnit => {
                let target = self.child(parent, unit, SPELLED, None);
                self.add(target, f32::NEG_INFINITY, p);
            }
        }
    }

    /// The arena node for `parent` + `unit` completing `word`, created on first use; `next` as
    /// for [`PrefixBeamSearch::extend`].
    fn child(&mut self, parent: u32, unit: u32, word: u32, next: Option<TrieNode>) -> u32 {
        if let Some(&c) = self.children.get(&(parent, unit, word)) {
            return c;
        }
        let p = &self.arena[parent as usize];
        let graph = self.graph;
        let is_boundary = Some(unit) == graph.boundary();
        let mut trie_node = p.trie;
        let mut word_len = p.word_len;
        let mut lm_state = p.lm_state;
        let mut context = p.context;
        let mut lookahead = 0.0;
        match (graph.trie(), word) {
            (Some(trie), NO_WORD) => {
                if !is_boundary {
                    if let Some(child) = next.or_else(|| trie.child(p.trie, unit)) {
                        trie_node = child;
                        lookahead = self.lookahead[child.index()];
                    }
                }
            }
            (Some(trie), word) => {
                let (lm, next) = self.word_score(&p.lm_state, word);
                lm_state = next;
                context += self.options.lm_weight * lm + self.options.word_bonus;
                trie_node = trie.root();
            }
            (None, NO_WORD) => {
                word_len = if is_boundary { 0 } else { word_len + 1 };
            }
            (None, _) => {
                let state = p.lm_state;
                if is_boundary {
                    self.spelled_word(parent);
                } else {
                    spell(graph, &[unit], &mut self.text);
                }
                let (lm, next) = self.spelled_score(&state);
                lm_state = next;
                context += self.options.lm_weight * lm + self.options.word_bonus;
                word_len = 0;
            }
        }
        let id = self.arena.len() as u32;
        self.arena.push(PrefixNode {
            parent,
            unit,
            word,
            trie: trie_node,
            word_len,
            lm_state,
            context,
            lookahead,
            stamp: 0,
            slot: 0,
        });
        self.children.insert((parent, unit, word), id);
        id
    }

    fn word_score(&self, state: &L::State, word: u32) -> (f32, L::State) {
        match self.lm_words[word as usize] {
            Some(w) => self.lm.score(state, w),
            None => (self.options.unknown_word_score, *state),
        }
    }

    /// Score of the word in `self.text`.
    fn spelled_score(&self, state: &L::State) -> (f32, L::State) {
        match self.lm.lookup(&self.text).or_else(|| self.lm.unknown()) {
            Some(w) => self.lm.score(state, w),
            None => (self.options.unknown_word_score, *state),
        }
    }

    /// Spells the unfinished word ending at `node` into `self.text`.
    fn spelled_word(&mut self, node: u32) {
        self.units.clear();
        let mut n = node;
        for _ in 0..self.arena[node as usize].word_len {
            self.units.push(self.arena[n as usize].unit);
            n = self.arena[n as usize].parent;
        }
        self.units.reverse();
        let units = std::mem::take(&mut self.units);
        spell(self.graph, &units, &mut self.text);
        self.units = units;
    }

    fn finals(&mut self) -> Vec<Final> {
        let mut finals = Vec::new();
        let weight = self.options.lm_weight;
        let bonus = self.options.word_bonus;
        for i in 0..self.beam.len() {
            let h = self.beam[i];
            let acoustic = log_add(h.blank, h.non_blank);
            if acoustic == f32::NEG_INFINITY {
                continue;
            }
            let node = self.arena[h.node as usize].clone();
            let closed =
                |lm: &L, state: &L::State| acoustic + node.context + weight * lm.end_score(state);
            match (self.graph.word_rule(), self.graph.trie()) {
                (WordRule::LexiconAtWordEnd, Some(trie)) => {
                    if node.trie == trie.root() {
                        finals.push(Final {
                            node: h.node,
                            pending: NO_WORD,
                            acoustic,
                            score: closed(self.lm, &node.lm_state),
                        });
                    }
                }
                (WordRule::LexiconAtBoundary, Some(trie)) => {
                    if node.trie == trie.root() {
                        finals.push(Final {
                            node: h.node,
                            pending: NO_WORD,
                            acoustic,
                            score: closed(self.lm, &node.lm_state),
                        });
                    } else {
                        for &word in trie.words_at(node.trie) {
                            let (lm, next) = self.word_score(&node.lm_state, word);
                            finals.push(Final {
                                node: h.node,
                                pending: word,
                                acoustic,
                                score: closed(self.lm, &next) + weight * lm + bonus,
                            });
                        }
                    }
                }
                (WordRule::SpelledAtBoundary, _) if node.word_len > 0 => {
                    self.spelled_word(h.node);
                    let (lm, next) = self.spelled_score(&node.lm_state);
                    finals.push(Final {
                        node: h.node,
                        pending: SPELLED,
                        acoustic,
                        score: closed(self.lm, &next) + weight * lm + bonus,
                    });
                }
                _ => finals.push(Final {
                    node: h.node,
                    pending: NO_WORD,
                    acoustic,
                    score: closed(self.lm, &node.lm_state),
                }),
            }
        }
        finals
    }

    fn transcript(&mut self, log_posteriors: ArrayView2<'_, f32>, f: &Final) -> Transcript {
        // Labels and word codes from the root down.
        let mut steps = Vec::new();
        let mut n = f.node;
        while n != 0 {
            let node = &self.arena[n as usize];
            steps.push((node.unit, node.word));
            n = node.parent;
        }
        steps.reverse();
        let labels: Vec<u32> = steps.iter().map(|s| s.0).collect();
        let graph = self.graph;
        let mut spans = Vec::new();
        let mut start = 0usize;
        let text_of = |word: u32, units: &[u32], text: &mut String| {
            if word == SPELLED {
                spell(graph, units, text);
                text.clone()
            } else {
                graph.words()[word as usize].clone()
            }
        };
        for (i, &(unit, word)) in steps.iter().enumerate() {
            let is_boundary = Some(unit) == graph.boundary();
            if is_boundary {
                if word != NO_WORD {
                    let text = text_of(word, &labels[start..i], &mut self.text);
                    spans.push(WordSpan {
                        text,
                        first: start,
                        last: i - 1,
                    });
                }
                start = i + 1;
            } else if word != NO_WORD {
                let text = text_of(word, &labels[start..=i], &mut self.text);
                spans.push(WordSpan {
                    text,
                    first: start,
                    last: i,
                });
                start = i + 1;
            }
        }
        if f.pending != NO_WORD && start < labels.len() {
            let text = text_of(f.pending, &labels[start..], &mut self.text);
            spans.push(WordSpan {
                text,
                first: start,
                last: labels.len() - 1,
            });
        }
        viterbi_runs(
            log_posteriors,
            &labels,
            &mut self.viterbi_scores,
            &mut self.viterbi_back,
            &mut self.runs,
        );
        Transcript {
            words: timed_words(spans, &self.runs),
            units: labels,
            score: f.score,
            acoustic_score: f.acoustic,
        }
    }
}

impl<L: LanguageModel> Decoder for PrefixBeamSearch<'_, L> {
    fn decode(&mut self, log_posteriors: ArrayView2<'_, f32>) -> Result<Transcript, DecodeError> {
        let mut best = self.decode_nbest(log_posteriors, 1)?;
        Ok(best.pop().unwrap_or(Transcript {
            words: Vec::new(),
            units: Vec::new(),
            score: f32::NEG_INFINITY,
            acoustic_score: f32::NEG_INFINITY,
        }))
    }

    fn decode_readings(
        &mut self,
        readings: &[ArrayView2<'_, f32>],
    ) -> Result<(Transcript, usize), DecodeError> {
        crate::decode_each_reading(self, readings)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn options_are_checked_against_their_limits() {
        SearchOptions::default().validate().unwrap();
        let bad = [
            SearchOptions {
                beam: 0,
                ..SearchOptions::default()
            },
            SearchOptions {
                beam: MAX_BEAM + 1,
                ..SearchOptions::default()
            },
            SearchOptions {
                lm_weight: f32::NAN,
                ..SearchOptions::default()
            },
            SearchOptions {
                word_bonus: f32::INFINITY,
                ..SearchOptions::default()
            },
            SearchOptions {
                unit_margin: Some(0.0),
                ..SearchOptions::default()
            },
            SearchOptions {
                skip_blank_above: Some(1.5),
                ..SearchOptions::default()
            },
        ];
        for options in bad {
            assert!(options.validate().is_err(), "{options:?}");
        }
    }

    /// One-frame readings worked by hand: the best hypothesis of a frame [0.2, 0.8, 0, 0] over
    /// (blank, a, b, <wb>) is "a" with acoustic score ln 0.8, of [0.1, 0, 0.9, 0] "b" with ln 0.9.
    #[test]
    fn the_reading_with_the_likeliest_hypothesis_is_kept_and_the_earliest_on_a_tie() {
        let graph =
            SearchGraph::lexicon_free(["<ctc-blank>", "a", "b", "<wb>"].map(String::from).to_vec())
                .unwrap();
        let lm = crate::NoLanguageModel;
        let mut search = PrefixBeamSearch::new(&graph, &lm, SearchOptions::default());
        let frame = |p: [f32; 4]| ndarray::Array2::from_shape_fn((1, 4), |(_, u)| p[u].ln());
        let reads_a = frame([0.2, 0.8, 0.0, 0.0]);
        let reads_b = frame([0.1, 0.0, 0.9, 0.0]);
        let empty = ndarray::Array2::<f32>::zeros((0, 4));
        let readings = [empty.view(), reads_a.view(), reads_b.view(), reads_b.view()];
        let (transcript, chosen) = search.decode_readings(&readings).unwrap();
        assert_eq!((transcript.text().as_str(), chosen), ("b", 2));
        assert!((transcript.acoustic_score - 0.9f32.ln()).abs() < 1e-5);
        // Nothing but empty readings: the first, decoded to no words.
        let (transcript, chosen) = search
            .decode_readings(&[empty.view(), empty.view()])
            .unwrap();
        assert_eq!((transcript.text().as_str(), chosen), ("", 0));
        // A greedy decoder compares nothing and keeps the first reading.
        let mut greedy = crate::GreedyDecoder::new(&graph);
        let (transcript, chosen) = greedy
            .decode_readings(&[reads_a.view(), reads_b.view()])
            .unwrap();
        assert_eq!((transcript.text().as_str(), chosen), ("a", 0));
        assert_eq!(search.decode_readings(&[]).unwrap().1, 0);
    }
}

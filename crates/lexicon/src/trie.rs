//! A prefix trie over unit-id sequences, the search space of lexicon-constrained decoding.
//!
//! Each lexicon entry (a word id and the unit ids that spell or pronounce it) is a path from the
//! root; the node where the path ends lists the word. Homophones (several words with one unit
//! sequence) share that node, and a word with several pronunciations ends at several nodes.
//!
//! Nodes are stored in one flat vector and addressed by [`TrieNode`]; a node is always created
//! after its parent, so walking the vector backwards visits every child before its parent. That
//! makes the look-ahead fill ([`PrefixTrie::fill_lookahead`]) a single backward pass without
//! recursion. Children are kept sorted by unit id so that [`PrefixTrie::child`] is a binary search
//! over a handful of entries and iteration order is deterministic.
//!
//! ```
//! use isogloss_lexicon::trie::PrefixTrie;
//!
//! // word 0 = "ab", word 1 = "ac", word 2 = "ab" again (a homophone)
//! let mut trie = PrefixTrie::build([(0, vec![1, 2]), (1, vec![1, 3]), (2, vec![1, 2])]);
//! let a = trie.child(trie.root(), 1).unwrap();
//! let ab = trie.child(a, 2).unwrap();
//! assert_eq!(trie.words_at(ab), &[0, 2]);
//! assert!(trie.words_at(a).is_empty());
//! // the decoder fills the look-ahead slot: best score of any word below a node
//! trie.fill_lookahead(|word| [-1.0, -0.5, -3.0][word as usize]);
//! assert_eq!(trie.lookahead(a), -0.5);
//! assert_eq!(trie.lookahead(ab), -1.0);
//! ```

/// Index of a node inside one [`PrefixTrie`]; only meaningful for the trie that returned it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct TrieNode(u32);

impl TrieNode {
    /// The node's position in the trie's node vector (useful for per-node side tables).
    pub fn index(self) -> usize {
        self.0 as usize
    }
}

#[derive(Debug, Clone)]
struct Node {
    /// `(unit id, child)`, sorted by unit id.
    children: Vec<(u32, TrieNode)>,
    /// Word ids whose unit sequence ends here, in insertion order, without duplicates.
    words: Vec<u32>,
    depth: u32,
    lookahead: f32,
}

impl Node {
    fn new(depth: u32) -> Self {
        Node {
            children: Vec::new(),
            words: Vec::new(),
            depth,
            lookahead: 0.0,
        }
    }
}

/// A prefix trie keyed by unit ids, with the words that end at each node and a per-node
/// look-ahead score slot.
#[derive(Debug, Clone)]
pub struct PrefixTrie {
    nodes: Vec<Node>,
    word_count: usize,
}

impl Default for PrefixTrie {
    fn default() -> Self {
        PrefixTrie {
            nodes: vec![Node::new(0)],
            word_count: 0,
        }
    }
}

impl PrefixTrie {
    /// Builds the trie from `(word id, unit ids)` pairs. Entries with an empty unit sequence are
    /// ignored (a word that spells nothing cannot be recognised); a repeated pair is stored once.
    pub fn build(entries: impl IntoIterator<Item = (u32, Vec<u32>)>) -> Self {
        let mut trie = PrefixTrie::default();
        for (word, units) in entries {
            trie.insert(word, &units);
        }
        trie
    }

    /// Adds one entry; returns the node where it ends (or `None` for an empty unit sequence).
    pub fn insert(&mut self, word: u32, units: &[u32]) -> Option<TrieNode> {
        if units.is_empty() {
            return None;
        }
        let mut node = self.root();
        for &unit in units {
            node = match self.child(node, unit) {
                Some(child) => child,
                None => self.add_child(node, unit),
            };
        }
        let words = &mut self.nodes[node.index()].words;
        if !words.contains(&word) {
            words.push(word);
            self.word_count += 1;
        }
        Some(node)
    }

    fn add_child(&mut self, parent: TrieNode, unit: u32) -> TrieNode {
        let child = TrieNode(self.nodes.len() as u32);
        let depth = self.nodes[parent.index()].depth + 1;
        self.nodes.push(Node::new(depth));
        let children = &mut self.nodes[parent.index()].children;
        let at = children.partition_point(|&(u, _)| u < unit);
        children.insert(at, (unit, child));
        child
    }

    /// Every node, in creation order (the root first, each parent before its children).
    pub fn nodes(&self) -> impl Iterator<Item = TrieNode> {
        (0..self.nodes.len() as u32).map(TrieNode)
    }

    /// The root (the empty unit sequence).
    pub fn root(&self) -> TrieNode {
        TrieNode(0)
    }

    /// Number of nodes, the root included.
    pub fn len(&self) -> usize {
        self.nodes.len()
    }

    /// True when the trie holds no entry (only the root).
    pub fn is_empty(&self) -> bool {
        self.nodes.len() == 1
    }

    /// Number of distinct (word, end node) pairs stored.
    pub fn entry_count(&self) -> usize {
        self.word_count
    }

    /// The child reached from `node` by `unit`, if any entry continues that way.
    pub fn child(&self, node: TrieNode, unit: u32) -> Option<TrieNode> {
        let children = &self.nodes[node.index()].children;
        children
            .binary_search_by_key(&unit, |&(u, _)| u)
            .ok()
            .map(|i| children[i].1)
    }

    /// The children of `node` as `(unit id, child)`, sorted by unit id.
    pub fn children(&self, node: TrieNode) -> &[(u32, TrieNode)] {
        &self.nodes[node.index()].children
    }

    /// Word ids whose unit sequence ends exactly at `node` (several for homophones).
    pub fn words_at(&self, node: TrieNode) -> &[u32] {
        &self.nodes[node.index()].words
    }

    /// Number of units from the root to `node`.
    pub fn depth(&self, node: TrieNode) -> usize {
        self.nodes[node.index()].depth as usize
    }

    /// The look-ahead score stored at `node` (0 until [`PrefixTrie::fill_lookahead`] runs).
    pub fn lookahead(&self, node: TrieNode) -> f32 {
        self.nodes[node.index()].lookahead
    }

    /// Sets every node's look-ahead slot to the best (highest) `word_score` of any word ending
    /// at the node or below it; nodes with no word below keep `f32::NEG_INFINITY`. The decoder
    /// passes an LM score here (a unigram log probability, say) so that a partial word can be
    /// ranked by the best word it can still become.
    pub fn fill_lookahead(&mut self, mut word_score: impl FnMut(u32) -> f32) {
        // Children have larger indices than their parents: one backward pass suffices.
        for i in (0..self.nodes.len()).rev() {
            let mut best = f32::NEG_INFINITY;
            for &word in &self.nodes[i].words {
                best = best.max(word_score(word));
            }
            for &(_, child) in &self.nodes[i].children {
                best = best.max(self.nodes[child.index()].lookahead);
            }
            self.nodes[i].lookahead = best;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn walk(trie: &PrefixTrie, units: &[u32]) -> Option<TrieNode> {
        units
            .iter()
            .try_fold(trie.root(), |node, &unit| trie.child(node, unit))
    }

    #[test]
    fn every_entry_is_found_at_the_end_of_its_path() {
        let entries = vec![
            (0, vec![3, 1, 4]),
            (1, vec![3, 1]),
            (2, vec![2, 7, 1, 8]),
            (3, vec![3, 1, 4]),
            (1, vec![3, 2]),
        ];
        let trie = PrefixTrie::build(entries.clone());
        for (word, units) in &entries {
            let node = walk(&trie, units).expect("path exists");
            assert!(trie.words_at(node).contains(word));
            assert_eq!(trie.depth(node), units.len());
        }
        // root + {3, 31, 314, 2, 27, 271, 2718, 32}
        assert_eq!(trie.len(), 9);
        assert_eq!(trie.entry_count(), 5);
        assert_eq!(trie.words_at(walk(&trie, &[3, 1, 4]).unwrap()), &[0, 3]);
        assert!(walk(&trie, &[3, 4]).is_none());
        assert!(trie.words_at(walk(&trie, &[2, 7]).unwrap()).is_empty());
    }

    #[test]
    fn children_are_sorted_and_duplicates_are_stored_once() {
        let trie = PrefixTrie::build([(5, vec![9]), (6, vec![2]), (7, vec![4]), (5, vec![9])]);
        let units: Vec<u32> = trie.children(trie.root()).iter().map(|c| c.0).collect();
        assert_eq!(units, vec![2, 4, 9]);
        assert_eq!(trie.entry_count(), 3);
    }

    #[test]
    fn empty_unit_sequences_are_ignored() {
        let trie = PrefixTrie::build([(0, vec![])]);
        assert!(trie.is_empty());
        assert!(trie.words_at(trie.root()).is_empty());
    }

    #[test]
    fn lookahead_is_the_best_word_score_in_the_subtree() {
        let mut trie = PrefixTrie::build([
            (0, vec![1, 2, 3]),
            (1, vec![1, 2]),
            (2, vec![1, 4]),
            (3, vec![5]),
        ]);
        let scores = [-2.0, -5.0, -1.0, -7.0];
        trie.fill_lookahead(|w| scores[w as usize]);
        assert_eq!(trie.lookahead(trie.root()), -1.0);
        assert_eq!(trie.lookahead(walk(&trie, &[1]).unwrap()), -1.0);
        assert_eq!(trie.lookahead(walk(&trie, &[1, 2]).unwrap()), -2.0);
        assert_eq!(trie.lookahead(walk(&trie, &[1, 2, 3]).unwrap()), -2.0);
        assert_eq!(trie.lookahead(walk(&trie, &[5]).unwrap()), -7.0);
        // brute force over all nodes: the slot equals the max over words whose path passes by
        let entries = [
            (0, vec![1, 2, 3]),
            (1, vec![1, 2]),
            (2, vec![1, 4]),
            (3, vec![5]),
        ];
        for (_, units) in &entries {
            for len in 0..=units.len() {
                let node = walk(&trie, &units[..len]).unwrap();
                let expected = entries
                    .iter()
                    .filter(|(_, u)| u.starts_with(&units[..len]))
                    .map(|(w, _)| scores[*w as usize])
                    .fold(f32::NEG_INFINITY, f32::max);
                assert_eq!(trie.lookahead(node), expected);
            }
        }
    }
}

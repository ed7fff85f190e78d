//! What the search may emit: the model's units, where words end, and (optionally) a lexicon.

use std::collections::HashMap;

use isogloss_lexicon::trie::PrefixTrie;

use crate::DecodeError;

/// The unit a grapheme model emits between words.
pub const BOUNDARY_UNIT: &str = "<wb>";

/// How a unit sequence is cut into words; decided once from the unit inventory and lexicon.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WordRule {
    /// Lexicon, model with a boundary unit (graphemes): a word ends at `<wb>` or at the end of
    /// the utterance, and the units before it must spell a lexicon entry.
    LexiconAtBoundary,
    /// Lexicon, no boundary unit (phones): a word ends wherever the units so far complete a
    /// lexicon entry; the search keeps both "word ends here" and "word goes on".
    LexiconAtWordEnd,
    /// No lexicon, boundary unit: words are the runs of units between boundaries, spelled by
    /// concatenating the unit symbols; any spelling is allowed.
    SpelledAtBoundary,
    /// No lexicon, no boundary unit: every unit is a word of its own (a unit-level LM applies).
    EveryUnit,
}

/// Counts from building a [`SearchGraph`] that the user should hear about.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LexiconReport {
    /// Lexicon entries used.
    pub entries_used: usize,
    /// Entries skipped because they use a unit the model lacks: `(word, unit)`, in file order.
    pub unknown_units: Vec<(String, String)>,
}

/// The model's unit inventory (blank at 0), the boundary unit if any, and an optional lexicon
/// compiled into a prefix trie over unit ids.
#[derive(Debug, Clone)]
pub struct SearchGraph {
    units: Vec<String>,
    boundary: Option<u32>,
    lexicon: Option<(PrefixTrie, Vec<String>)>,
}

impl SearchGraph {
    /// A graph without lexicon: words are split at the boundary unit if the inventory has one,
    /// otherwise every unit is a word.
    pub fn lexicon_free(units: Vec<String>) -> Result<Self, DecodeError> {
        check_units(&units)?;
        let boundary = units
            .iter()
            .position(|u| u == BOUNDARY_UNIT)
            .map(|i| i as u32);
        Ok(SearchGraph {
            units,
            boundary,
            lexicon: None,
        })
    }

    /// A graph whose words must come from `entries` (`(word, units)`, several rows per word
    /// allowed). Entries that use a unit the model does not know are skipped and listed in the
    /// report; if no entry is usable the lexicon is rejected.
    pub fn with_lexicon(
        units: Vec<String>,
        entries: &[(String, Vec<String>)],
    ) -> Result<(Self, LexiconReport), DecodeError> {
        let mut graph = SearchGraph::lexicon_free(units)?;
        let unit_ids: HashMap<&str, u32> = graph
            .units
            .iter()
            .enumerate()
            .skip(1)
            .filter(|(i, _)| Some(*i as u32) != graph.boundary)
            .map(|(i, u)| (u.as_str(), i as u32))
            .collect();
        let mut word_ids: HashMap<&str, u32> = HashMap::new();
        let mut words = Vec::new();
        let mut report = LexiconReport::default();
        let mut trie = PrefixTrie::default();
        for (word, spelling) in entries {
            let ids: Result<Vec<u32>, &String> = spelling
                .iter()
                .map(|u| unit_ids.get(u.as_str()).copied().ok_or(u))
                .collect();
            match ids {
                Err(unit) => report.unknown_units.push((word.clone(), unit.clone())),
                Ok(ids) if ids.is_empty() => {}
                Ok(ids) => {
                    let id = *word_ids.entry(word.as_str()).or_insert_with(|| {
                        words.push(word.clone());
                        words.len() as u32 - 1
                    });
                    trie.insert(id, &ids);
                    report.entries_used += 1;
                }
            }
        }
        if report.entries_used == 0 {
            return Err(DecodeError::UnusableLexicon {
                entries: entries.len(),
                example: report
                    .unknown_units
                    .first()
                    .map(|(w, u)| format!("word {w:?} uses unit {u:?}"))
                    .unwrap_or_else(|| "no entry has units".to_string()),
            });
        }
        graph.lexicon = Some((trie, words));
        Ok((graph, report))
    }

    /// The unit symbols, blank at index 0.
    pub fn units(&self) -> &[String] {
        &self.units
    }

    /// Index of the boundary unit `<wb>`, if the model has one.
    pub fn boundary(&self) -> Option<u32> {
        self.boundary
    }

    /// How words are delimited with this graph.
    pub fn word_rule(&self) -> WordRule {
        match (self.lexicon.is_some(), self.boundary.is_some()) {
            (true, true) => WordRule::LexiconAtBoundary,
            (true, false) => WordRule::LexiconAtWordEnd,
            (false, true) => WordRule::SpelledAtBoundary,
            (false, false) => WordRule::EveryUnit,
        }
    }

    /// Words of an LM vocabulary that the lexicon cannot produce, so the LM's probability mass
    /// on them is lost (sentence markers and `<unk>` aside). Empty without a lexicon, where any
    /// spelling can be produced.
    pub fn unreachable_words<'v>(
        &self,
        vocabulary: impl IntoIterator<Item = &'v str>,
    ) -> Vec<&'v str> {
        if self.lexicon.is_none() {
            return Vec::new();
        }
        let known: std::collections::HashSet<&str> =
            self.words().iter().map(|w| w.as_str()).collect();
        vocabulary
            .into_iter()
            .filter(|w| !matches!(*w, "<s>" | "</s>" | "<unk>") && !known.contains(w))
            .collect()
    }

    /// The lexicon trie, if any.
    pub fn trie(&self) -> Option<&PrefixTrie> {
        self.lexicon.as_ref().map(|(t, _)| t)
    }

    /// The lexicon's distinct words, indexed by the word ids in the trie (empty without one).
    pub fn words(&self) -> &[String] {
        self.lexicon
            .as_ref()
            .map(|(_, w)| w.as_slice())
            .unwrap_or(&[])
    }
}

fn check_units(units: &[String]) -> Result<(), DecodeError> {
    if units.len() < 2 {
        return Err(DecodeError::TooFewUnits(units.len()));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn units(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    fn entry(word: &str, spelling: &[&str]) -> (String, Vec<String>) {
        (word.to_string(), units(spelling))
    }

    #[test]
    fn word_rule_follows_lexicon_and_boundary() {
        let g = SearchGraph::lexicon_free(units(&["<ctc-blank>", "a", "<wb>"])).unwrap();
        assert_eq!(g.word_rule(), WordRule::SpelledAtBoundary);
        assert_eq!(g.boundary(), Some(2));
        let g = SearchGraph::lexicon_free(units(&["<ctc-blank>", "a"])).unwrap();
        assert_eq!(g.word_rule(), WordRule::EveryUnit);
        let (g, _) =
            SearchGraph::with_lexicon(units(&["<ctc-blank>", "a", "<wb>"]), &[entry("a", &["a"])])
                .unwrap();
        assert_eq!(g.word_rule(), WordRule::LexiconAtBoundary);
        let (g, _) =
            SearchGraph::with_lexicon(units(&["<ctc-blank>", "a"]), &[entry("a", &["a"])]).unwrap();
        assert_eq!(g.word_rule(), WordRule::LexiconAtWordEnd);
    }

    #[test]
    fn entries_with_unknown_units_are_skipped_and_reported() {
        let (g, report) = SearchGraph::with_lexicon(
            units(&["<ctc-blank>", "a", "b"]),
            &[
                entry("ab", &["a", "b"]),
                entry("ax", &["a", "x"]),
                entry("ab", &["b"]),
                entry("blank", &["<ctc-blank>"]),
            ],
        )
        .unwrap();
        assert_eq!(report.entries_used, 2);
        assert_eq!(
            report.unknown_units,
            vec![
                ("ax".to_string(), "x".to_string()),
                ("blank".to_string(), "<ctc-blank>".to_string())
            ]
        );
        assert_eq!(g.words(), &["ab".to_string()]);
        assert_eq!(
            g.unreachable_words(["<s>", "ab", "ax", "</s>", "<unk>"]),
            vec!["ax"]
        );
        let err = SearchGraph::with_lexicon(units(&["<ctc-blank>", "a"]), &[entry("q", &["q"])])
            .unwrap_err()
            .to_string();
        assert!(err.contains("\"q\""), "{err}");
    }

    #[test]
    fn an_inventory_without_units_is_rejected() {
        assert!(SearchGraph::lexicon_free(units(&["<ctc-blank>"])).is_err());
    }
}

//! The unit inventory: what the network's outputs stand for.
//!
//! Index 0 is always the CTC blank [`BLANK`]. Grapheme inventories add the word-boundary unit
//! [`WORD_BOUNDARY`] between words so that greedy output can be split back into words; phone
//! inventories come from a lexicon and have no boundary unit.

use std::collections::{BTreeMap, BTreeSet};

use serde::{Deserialize, Serialize};

use crate::AcousticError;

/// The CTC blank, always unit 0.
pub const BLANK: &str = "<ctc-blank>";
/// The blank's spelling in models of the previous release, read with a deprecation warning.
pub const PREVIOUS_BLANK: &str = "<blk>";
/// Between the words of a grapheme sequence.
pub const WORD_BOUNDARY: &str = "<wb>";

/// What the units are.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum UnitKind {
    /// Characters of the transcript, with [`WORD_BOUNDARY`] between words.
    Graphemes,
    /// Phones from a lexicon.
    Phones,
}

/// The ordered units of a model, blank first.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct UnitInventory {
    /// Graphemes or phones.
    pub kind: UnitKind,
    /// Unit names; `units[0] == BLANK`.
    pub units: Vec<String>,
}

/// Splits a transcript into words exactly as the scorer does (the token rules of `docs/scoring.md`: NFC, lower
/// case, punctuation other than apostrophes and hyphens turned into spaces, split on white
/// space), so that the model learns the words that WER will count.
pub fn transcript_words(text: &str) -> Vec<String> {
    isogloss_score::tokenize(text, &isogloss_score::TokenRules::default())
}

/// Grapheme units of one transcript: the characters of each word, `<wb>` between words.
pub fn grapheme_sequence(text: &str) -> Vec<String> {
    let mut units = Vec::new();
    for (i, word) in transcript_words(text).iter().enumerate() {
        if i > 0 {
            units.push(WORD_BOUNDARY.to_string());
        }
        units.extend(word.chars().map(|c| c.to_string()));
    }
    units
}

impl UnitInventory {
    /// Blank, word boundary, then every character seen in `transcripts`, sorted.
    pub fn graphemes<'a>(transcripts: impl IntoIterator<Item = &'a str>) -> Self {
        let mut seen = BTreeSet::new();
        for text in transcripts {
            for word in transcript_words(text) {
                seen.extend(word.chars().map(|c| c.to_string()));
            }
        }
        let mut units = vec![BLANK.to_string(), WORD_BOUNDARY.to_string()];
        units.extend(seen);
        UnitInventory {
            kind: UnitKind::Graphemes,
            units,
        }
    }

    /// Blank then the given phones, sorted.
    pub fn phones(phones: impl IntoIterator<Item = String>) -> Self {
        let set: BTreeSet<String> = phones.into_iter().collect();
        let mut units = vec![BLANK.to_string()];
        units.extend(set);
        UnitInventory {
            kind: UnitKind::Phones,
            units,
        }
    }

    /// Number of units including the blank.
    pub fn len(&self) -> usize {
        self.units.len()
    }

    /// True only for an inventory without even the blank (never produced by the constructors).
    pub fn is_empty(&self) -> bool {
        self.units.is_empty()
    }

    /// Unit indices for unit names; `item` names the utterance in the error.
    pub fn encode(&self, names: &[String], item: &str) -> Result<Vec<u32>, AcousticError> {
        let index: BTreeMap<&str, u32> = self
            .units
            .iter()
            .enumerate()
            .map(|(i, u)| (u.as_str(), i as u32))
            .collect();
        names
            .iter()
            .map(|name| match index.get(name.as_str()) {
                Some(&0) | None => Err(AcousticError::UnknownUnit {
                    item: item.to_string(),
                    unit: name.clone(),
                }),
                Some(&i) => Ok(i),
            })
            .collect()
    }

    /// Checks that unit 0 is the blank and that names are unique.
    pub fn validate(&self) -> Result<(), AcousticError> {
        if self.units.first().map(String::as_str) != Some(BLANK) {
            return Err(AcousticError::Config(format!(
                "the unit inventory must start with {BLANK}, found {:?}",
                self.units.first()
            )));
        }
        let distinct: BTreeSet<&String> = self.units.iter().collect();
        if distinct.len() != self.units.len() {
            return Err(AcousticError::Config(
                "the unit inventory lists a unit twice".into(),
            ));
        }
        Ok(())
    }

    /// Turns decoded units into text: graphemes are joined, `<wb>` becomes a space; phones are
    /// joined by spaces.
    pub fn to_text(&self, units: &[String]) -> String {
        match self.kind {
            UnitKind::Graphemes => {
                let joined: String = units
                    .iter()
                    .map(|u| if u == WORD_BOUNDARY { " " } else { u.as_str() })
                    .collect();
                joined.split_whitespace().collect::<Vec<_>>().join(" ")
            }
            UnitKind::Phones => units.join(" "),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn graphemes_follow_the_scoring_token_rules() {
        // docs/scoring.md token rules: NFC, lower case, punctuation except ' and - becomes a space.
        let text = "Ca\u{0301}n't, we-go? Éh!";
        assert_eq!(transcript_words(text), vec!["cán't", "we-go", "éh"]);
        let units = grapheme_sequence("ab  c.");
        assert_eq!(units, vec!["a", "b", WORD_BOUNDARY, "c"]);
        let inventory = UnitInventory::graphemes(["ab c", "Ba"]);
        assert_eq!(inventory.units, vec![BLANK, WORD_BOUNDARY, "a", "b", "c"]);
        assert_eq!(inventory.encode(&units, "u1").unwrap(), vec![2, 3, 1, 4]);
        assert_eq!(inventory.to_text(&units), "ab c");
        let err = inventory.encode(&["z".to_string()], "utt7").unwrap_err();
        assert!(err.to_string().contains("utt7") && err.to_string().contains("\"z\""));
    }
}

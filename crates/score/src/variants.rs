//! Permissible spelling variants: the `variants.tsv` map (header `variant<TAB>normalized`, one
//! row per spelling and normalized form) and the builder that derives it from two word-aligned
//! transcript columns.
//!
//! Two words match flexibly iff they are equal or share a normalized form. A word may have
//! several normalized forms, and a normalized form counts as one of its own spellings, so a
//! hypothesis written in the normalized spelling is forgiven against a dialectal reference.

use std::collections::{BTreeSet, HashMap};
use std::path::Path;

use isogloss_corpus::tsv::{write_table, Table};

use crate::align::{align_by, Alignment, Match};
use crate::tokens::{tokenize, TokenRules};
use crate::ScoreError;

/// The header a variants file must start with (`docs/formats.md`, "Variant map").
pub const VARIANTS_HEADER: [&str; 2] = ["variant", "normalized"];

/// Aligns two token sequences; words that `variants` declares permissible variants of each
/// other cost 0. Pass an empty map for plain WER.
pub fn align(reference: &[String], hypothesis: &[String], variants: &VariantMap) -> Alignment {
    align_by(reference, hypothesis, |r, h| variants.compare(r, h))
}

/// Which words are permissible spelling variants of which: every word maps to the set of its
/// normalized forms.
#[derive(Debug, Clone, Default)]
pub struct VariantMap {
    /// Normalized forms by number, so that a word's forms are a short sorted list of integers.
    normalized: Vec<String>,
    normalized_index: HashMap<String, usize>,
    /// Sorted, deduplicated normalized-form numbers of each word.
    forms: HashMap<String, Vec<usize>>,
}

impl VariantMap {
    /// An empty map: flexible scoring with it equals plain scoring.
    pub fn new() -> Self {
        VariantMap::default()
    }

    /// Declares `variant` a spelling of the normalized form `normalized`. Words are taken as
    /// given; callers apply the token rules first.
    pub fn insert(&mut self, variant: &str, normalized: &str) {
        let next = self.normalized.len();
        let id = *self
            .normalized_index
            .entry(normalized.to_string())
            .or_insert(next);
        if id == next {
            self.normalized.push(normalized.to_string());
        }
        for word in [variant, normalized] {
            let forms = self.forms.entry(word.to_string()).or_default();
            if let Err(position) = forms.binary_search(&id) {
                forms.insert(position, id);
            }
        }
    }

    /// Number of distinct normalized forms.
    pub fn normalized_forms(&self) -> usize {
        self.normalized.len()
    }

    /// Number of distinct words (spellings and normalized forms) the map knows.
    pub fn words(&self) -> usize {
        self.forms.len()
    }

    /// Whether the map declares no variants at all.
    pub fn is_empty(&self) -> bool {
        self.normalized.is_empty()
    }

    /// The normalized forms of a word (empty for a word the map does not know).
    pub fn normalized_forms_of(&self, word: &str) -> Vec<&str> {
        self.forms
            .get(word)
            .map(|ids| ids.iter().map(|&id| self.normalized[id].as_str()).collect())
            .unwrap_or_default()
    }

    /// How a reference word and a hypothesis word compare: equal, permissible variants (they
    /// share a normalized form), or different.
    pub fn compare(&self, reference: &str, hypothesis: &str) -> Match {
        if reference == hypothesis {
            return Match::Exact;
        }
        match (self.forms.get(reference), self.forms.get(hypothesis)) {
            (Some(a), Some(b)) if sorted_lists_intersect(a, b) => Match::Variant,
            _ => Match::Different,
        }
    }

    /// Reads a variants file. The header must name the columns `variant` and `normalized`;
    /// each field must be one word under `rules` (which are applied to it, so that file entries
    /// compare equal to scored tokens).
    pub fn read(path: &Path, rules: &TokenRules) -> Result<VariantMap, ScoreError> {
        let table = Table::read_with_header(path)?;
        let (Ok(variant_column), Ok(normalized_column)) = (
            table.column(VARIANTS_HEADER[0]),
            table.column(VARIANTS_HEADER[1]),
        ) else {
            return Err(ScoreError::Format {
                path: path.to_path_buf(),
                line: 1,
                message: format!(
                    "expected the header row `variant<TAB>normalized`, found `{}`",
                    table.header.join("<TAB>")
                ),
            });
        };
        let mut map = VariantMap::new();
        for record in &table.records {
            let word = |column: usize, name: &str| -> Result<String, ScoreError> {
                let field = &record.fields[column];
                let mut tokens = tokenize(field, rules);
                match (tokens.pop(), tokens.is_empty()) {
                    (Some(word), true) => Ok(word),
                    _ => Err(ScoreError::Format {
                        path: path.to_path_buf(),
                        line: record.line,
                        message: format!(
                            "expected one word in the `{name}` column, found `{field}`"
                        ),
                    }),
                }
            };
            let variant = word(variant_column, VARIANTS_HEADER[0])?;
            let normalized = word(normalized_column, VARIANTS_HEADER[1])?;
            map.insert(&variant, &normalized);
        }
        Ok(map)
    }
}

fn sorted_lists_intersect(a: &[usize], b: &[usize]) -> bool {
    let (mut i, mut j) = (0, 0);
    while i < a.len() && j < b.len() {
        match a[i].cmp(&b[j]) {
            std::cmp::Ordering::Equal => return true,
            std::cmp::Ordering::Less => i += 1,
            std::cmp::Ordering::Greater => j += 1,
        }
    }
    false
}

/// One utterance's two writings, as the variants builder takes them.
#[derive(Debug, Clone, Copy)]
pub struct TranscriptPair<'a> {
    /// Utterance id, for the list of skipped rows.
    pub id: &'a str,
    /// Line in the manifest, for the list of skipped rows.
    pub line: usize,
    /// The writing whose words become variants (e.g. dialectal).
    pub from: &'a str,
    /// The writing whose words become normalized forms (e.g. normalized).
    pub to: &'a str,
}

/// A row the builder could not use because its two writings have different token counts.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct SkippedPair {
    /// Utterance id.
    pub id: String,
    /// Line in the manifest.
    pub line: usize,
    /// Tokens in the `from` writing.
    pub from_words: usize,
    /// Tokens in the `to` writing.
    pub to_words: usize,
}

/// Variant pairs derived from word-aligned transcripts.
#[derive(Debug, Clone, Default, serde::Serialize, serde::Deserialize)]
pub struct VariantTable {
    /// Distinct (variant, normalized) pairs, sorted.
    pub pairs: BTreeSet<(String, String)>,
    /// Utterances whose two writings could be paired word by word.
    pub utterances_used: usize,
    /// Utterances skipped because their token counts differ.
    pub skipped: Vec<SkippedPair>,
}

impl VariantTable {
    /// Pairs the words of two writings position by position. Only rows with equal token counts
    /// are used: without a count match there is no safe word alignment, and a guessed one would
    /// put wrong pairs into the map that then forgive real errors.
    pub fn build<'a>(
        rows: impl IntoIterator<Item = TranscriptPair<'a>>,
        rules: &TokenRules,
    ) -> VariantTable {
        let mut table = VariantTable::default();
        for row in rows {
            let from = tokenize(row.from, rules);
            let to = tokenize(row.to, rules);
            if from.len() != to.len() {
                table.skipped.push(SkippedPair {
                    id: row.id.to_string(),
                    line: row.line,
                    from_words: from.len(),
                    to_words: to.len(),
                });
                continue;
            }
            table.utterances_used += 1;
            table.pairs.extend(from.into_iter().zip(to));
        }
        table
    }

    /// The map these pairs define.
    pub fn to_map(&self) -> VariantMap {
        let mut map = VariantMap::new();
        for (variant, normalized) in &self.pairs {
            map.insert(variant, normalized);
        }
        map
    }

    /// Writes the pairs as a variants file (header `variant<TAB>normalized`), atomically.
    pub fn write(&self, path: &Path) -> Result<(), ScoreError> {
        let rows: Vec<Vec<String>> = self
            .pairs
            .iter()
            .map(|(variant, normalized)| vec![variant.clone(), normalized.clone()])
            .collect();
        write_table(path, &VARIANTS_HEADER, &rows)?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::PathBuf;

    fn temp_file(dir: &tempfile::TempDir, name: &str, text: &str) -> PathBuf {
        let path = dir.path().join(name);
        std::fs::write(&path, text).unwrap();
        path
    }

    #[test]
    fn words_sharing_a_normalized_form_are_variants() {
        let mut map = VariantMap::new();
        map.insert("owd", "old");
        map.insert("auld", "old");
        // `ar` is written for `yes` in one region and for `our` in another.
        map.insert("ar", "yes");
        map.insert("ar", "our");
        assert_eq!(map.compare("owd", "auld"), Match::Variant);
        assert_eq!(map.compare("owd", "old"), Match::Variant);
        assert_eq!(map.compare("owd", "owd"), Match::Exact);
        assert_eq!(map.compare("owd", "ar"), Match::Different);
        assert_eq!(map.compare("our", "ar"), Match::Variant);
        assert_eq!(map.compare("unknown", "owd"), Match::Different);
        // In the order the normalized forms were first inserted.
        assert_eq!(map.normalized_forms_of("ar"), ["yes", "our"]);
    }

    #[test]
    fn reads_a_variants_file_applying_the_token_rules() {
        let dir = tempfile::tempdir().unwrap();
        let path = temp_file(
            &dir,
            "v.tsv",
            "variant\tnormalized\nOWD\tOld\n\nLi’l-Un\tlittle-one\n",
        );
        let map = VariantMap::read(&path, &TokenRules::default()).unwrap();
        assert_eq!(map.compare("owd", "old"), Match::Variant);
        assert_eq!(map.compare("li’l-un", "little-one"), Match::Variant);
        assert_eq!(map.normalized_forms(), 2);
    }

    #[test]
    fn a_variants_file_without_header_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = temp_file(&dir, "v.tsv", "owd\told\nar\tyes\n");
        let message = VariantMap::read(&path, &TokenRules::default())
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("v.tsv")
                && message.contains("line 1")
                && message.contains("variant<TAB>normalized")
                && message.contains("owd<TAB>old"),
            "{message}"
        );
    }

    #[test]
    fn a_field_with_two_words_names_its_line() {
        let dir = tempfile::tempdir().unwrap();
        let path = temp_file(&dir, "v.tsv", "variant\tnormalized\na\tb\ndoon by\tdown\n");
        let message = VariantMap::read(&path, &TokenRules::default())
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("line 3") && message.contains("`doon by`"),
            "{message}"
        );
    }

    #[test]
    fn builder_pairs_words_and_lists_rows_whose_counts_differ() {
        let rows = [
            TranscriptPair {
                id: "u1",
                line: 2,
                from: "Me owd hoose",
                to: "my old house",
            },
            TranscriptPair {
                id: "u2",
                line: 3,
                from: "t’owd hoose",
                to: "the old house",
            },
            TranscriptPair {
                id: "u3",
                line: 4,
                from: "auld hoose",
                to: "old house",
            },
        ];
        let table = VariantTable::build(rows, &TokenRules::default());
        assert_eq!(table.utterances_used, 2);
        assert_eq!(
            table.skipped,
            [SkippedPair {
                id: "u2".into(),
                line: 3,
                from_words: 2,
                to_words: 3
            }]
        );
        assert!(table
            .pairs
            .contains(&("auld".to_string(), "old".to_string())));
        // me→my, owd→old, hoose→house (twice), auld→old.
        assert_eq!(table.pairs.len(), 4);
        let map = table.to_map();
        assert_eq!(map.compare("owd", "auld"), Match::Variant);

        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("variants.tsv");
        table.write(&path).unwrap();
        let reread = VariantMap::read(&path, &TokenRules::default()).unwrap();
        assert_eq!(reread.compare("owd", "auld"), Match::Variant);
        assert_eq!(reread.words(), map.words());
    }
}

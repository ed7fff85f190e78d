//! The lexicon value type and its tab-separated file (`word<TAB>unit unit unit`, no header, a
//! word may have several rows).

use std::collections::{BTreeSet, HashMap, HashSet};
use std::path::Path;

use isogloss_corpus::tsv::{read_utf8, write_table, Table};
use unicode_normalization::UnicodeNormalization;

use crate::LexiconError;

/// A pronunciation lexicon: words with one or more unit sequences (phonemes or graphemes), in
/// file order. The same word may appear in several entries (pronunciation variants); an entry
/// never has an empty unit sequence.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Lexicon {
    /// `(word, units)` pairs in the order they were read or added.
    pub entries: Vec<(String, Vec<String>)>,
}

/// The letters of a word as isogloss counts them: the Unicode scalar values of its NFC
/// composition, each as its own string (so that `ä` typed either way is one letter).
pub fn letters(word: &str) -> Vec<String> {
    word.nfc().map(|c| c.to_string()).collect()
}

/// Reads a word list: every white-space separated token of the file is a word (so both one
/// word a line and running text work); duplicates are dropped, first-seen order kept.
pub fn read_word_list(path: &Path) -> Result<Vec<String>, LexiconError> {
    let text = read_utf8(path)?;
    let mut seen = HashSet::new();
    let mut words = Vec::new();
    for word in text.split_whitespace() {
        if seen.insert(word) {
            words.push(word.to_string());
        }
    }
    Ok(words)
}

impl Lexicon {
    /// A lexicon from `(word, units)` pairs; exact duplicate entries are kept once and entries
    /// with an empty word or no units are left out (they could never be decoded).
    pub fn from_entries(entries: impl IntoIterator<Item = (String, Vec<String>)>) -> Lexicon {
        let mut seen = HashSet::new();
        let entries = entries
            .into_iter()
            .filter(|(word, units)| !word.is_empty() && !units.is_empty())
            .filter(|entry| seen.insert(entry.clone()))
            .collect();
        Lexicon { entries }
    }

    /// Reads a lexicon file. Every non-blank line must be `word<TAB>units` with a non-empty word
    /// and at least one unit; errors name the file and line. Exact duplicate lines are kept once.
    pub fn read(path: &Path) -> Result<Lexicon, LexiconError> {
        let table = Table::read_without_header(path, 2)?;
        let format = |line: usize, message: String| LexiconError::Format {
            path: path.to_path_buf(),
            line,
            message,
        };
        let mut entries = Vec::with_capacity(table.records.len());
        let mut seen = HashSet::new();
        for record in &table.records {
            if record.fields.len() != 2 {
                return Err(format(
                    record.line,
                    format!(
                        "expected 2 tab-separated fields (word, units), found {}",
                        record.fields.len()
                    ),
                ));
            }
            let word = record.fields[0].trim();
            if word.is_empty() {
                return Err(format(
                    record.line,
                    "expected a word in the first field, found nothing".into(),
                ));
            }
            let units: Vec<String> = record.fields[1]
                .split_whitespace()
                .map(str::to_string)
                .collect();
            if units.is_empty() {
                return Err(format(
                    record.line,
                    format!("expected at least one unit after the word `{word}`, found none"),
                ));
            }
            if seen.insert((word.to_string(), units.clone())) {
                entries.push((word.to_string(), units));
            }
        }
        Ok(Lexicon { entries })
    }

    /// Writes the lexicon file (atomically: a half-written lexicon never replaces a good one).
    pub fn write(&self, path: &Path) -> Result<(), LexiconError> {
        let rows: Vec<Vec<String>> = self
            .entries
            .iter()
            .map(|(word, units)| vec![word.clone(), units.join(" ")])
            .collect();
        write_table(path, &[], &rows)?;
        Ok(())
    }

    /// The unit inventory: every unit used by some entry, sorted.
    pub fn units(&self) -> BTreeSet<String> {
        self.entries
            .iter()
            .flat_map(|(_, units)| units.iter().cloned())
            .collect()
    }

    /// The distinct words, in first-seen order.
    pub fn words(&self) -> Vec<&str> {
        let mut seen = HashSet::new();
        self.entries
            .iter()
            .map(|(word, _)| word.as_str())
            .filter(|word| seen.insert(*word))
            .collect()
    }

    /// All pronunciations of `word` (exact match), in file order; empty when it is not listed.
    pub fn pronunciations(&self, word: &str) -> Vec<&[String]> {
        self.entries
            .iter()
            .filter(|(w, _)| w == word)
            .map(|(_, units)| units.as_slice())
            .collect()
    }

    /// A word → pronunciations index for many look-ups (each [`Lexicon::pronunciations`] call
    /// scans the whole lexicon).
    pub fn index(&self) -> HashMap<&str, Vec<&[String]>> {
        let mut index: HashMap<&str, Vec<&[String]>> = HashMap::new();
        for (word, units) in &self.entries {
            index.entry(word).or_default().push(units);
        }
        index
    }

    /// Splits the lexicon by word into `(rest, held_out)`: a random `fraction` of the distinct
    /// words (rounded), all their pronunciations together, chosen reproducibly from `seed`.
    pub fn split_held_out(&self, fraction: f64, seed: u64) -> (Lexicon, Lexicon) {
        use rand::seq::SliceRandom;
        use rand::SeedableRng;
        let mut words = self.words();
        words.sort_unstable();
        words.shuffle(&mut rand_chacha::ChaCha8Rng::seed_from_u64(seed));
        let count = (words.len() as f64 * fraction.clamp(0.0, 1.0)).round() as usize;
        let held: HashSet<&str> = words[..count].iter().copied().collect();
        let (held_out, rest): (Vec<_>, Vec<_>) = self
            .entries
            .iter()
            .cloned()
            .partition(|(word, _)| held.contains(word.as_str()));
        (Lexicon { entries: rest }, Lexicon { entries: held_out })
    }

    /// A grapheme lexicon for grapheme-unit acoustic models: each word's units are its
    /// [`letters`], followed by `boundary` when given (the word-boundary unit, e.g. `<wb>`).
    ///
    /// Apostrophes and hyphens are kept as units of their own. Dialect transcripts mark elision
    /// with apostrophes (`goin'`) and join compounds with hyphens, and a grapheme acoustic model
    /// trained on the same transcripts emits exactly those characters; mapping them to anything
    /// else would make such words unreachable for the decoder. Words are not lower-cased here:
    /// the lexicon spells what the transcript writes. Empty words and duplicates are skipped.
    pub fn graphemes<'a>(
        words: impl IntoIterator<Item = &'a str>,
        boundary: Option<&str>,
    ) -> Lexicon {
        let mut seen = HashSet::new();
        let mut entries = Vec::new();
        for word in words {
            if word.is_empty() || !seen.insert(word) {
                continue;
            }
            let mut units = letters(word);
            if let Some(boundary) = boundary {
                units.push(boundary.to_string());
            }
            entries.push((word.to_string(), units));
        }
        Lexicon { entries }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strings(items: &[&str]) -> Vec<String> {
        items.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn reads_variants_and_writes_them_back_unchanged() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("lexicon.tsv");
        std::fs::write(
            &path,
            "hoose\tHH UW S\nowd\tAW D\nowd\tOW D\r\n\nhoose\tHH UW S\n",
        )
        .unwrap();
        let lexicon = Lexicon::read(&path).unwrap();
        assert_eq!(lexicon.entries.len(), 3, "the exact duplicate is kept once");
        assert_eq!(lexicon.words(), ["hoose", "owd"]);
        assert_eq!(
            lexicon.pronunciations("owd"),
            [strings(&["AW", "D"]), strings(&["OW", "D"])]
        );
        assert!(lexicon.pronunciations("goin").is_empty());
        assert_eq!(
            lexicon.units().into_iter().collect::<Vec<_>>(),
            ["AW", "D", "HH", "OW", "S", "UW"]
        );
        assert_eq!(lexicon.index()["owd"].len(), 2);

        let copy = dir.path().join("copy.tsv");
        lexicon.write(&copy).unwrap();
        assert_eq!(
            std::fs::read_to_string(&copy).unwrap(),
            "hoose\tHH UW S\nowd\tAW D\nowd\tOW D\n"
        );
        assert_eq!(Lexicon::read(&copy).unwrap(), lexicon);
    }

    #[test]
    fn bad_lines_are_named() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("bad.tsv");
        std::fs::write(&path, "hoose\tHH UW S\nowd\t  \n").unwrap();
        let error = Lexicon::read(&path).unwrap_err().to_string();
        assert!(error.contains("bad.tsv, line 2"), "{error}");
        assert!(error.contains("at least one unit"), "{error}");

        std::fs::write(&path, "hoose HH UW S\n").unwrap();
        let error = Lexicon::read(&path).unwrap_err().to_string();
        assert!(error.contains("line 1"), "{error}");

        std::fs::write(&path, "hoose\tHH\t0.5\n").unwrap();
        let error = Lexicon::read(&path).unwrap_err().to_string();
        assert!(error.contains("expected 2 tab-separated fields"), "{error}");
    }

    #[test]
    fn grapheme_lexicon_keeps_apostrophes_and_hyphens_and_composes_letters() {
        // "i" + U+0308 COMBINING DIAERESIS composes to one letter "ï" under NFC (Unicode UAX #15).
        let lexicon = Lexicon::graphemes(["goin'", "owd-un", "nai\u{308}ve", "goin'", ""], None);
        assert_eq!(lexicon.entries.len(), 3);
        assert_eq!(
            lexicon.pronunciations("goin'"),
            [strings(&["g", "o", "i", "n", "'"])]
        );
        assert_eq!(
            lexicon.pronunciations("owd-un"),
            [strings(&["o", "w", "d", "-", "u", "n"])]
        );
        assert_eq!(
            lexicon.pronunciations("nai\u{308}ve"),
            [strings(&["n", "a", "ï", "v", "e"])]
        );
        let with_boundary = Lexicon::graphemes(["an"], Some("<wb>"));
        assert_eq!(
            with_boundary.pronunciations("an"),
            [strings(&["a", "n", "<wb>"])]
        );
    }

    #[test]
    fn word_lists_split_on_white_space_and_drop_duplicates() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("words.txt");
        std::fs::write(&path, "hoose owd\nhoose\n\n  goin'\n").unwrap();
        assert_eq!(read_word_list(&path).unwrap(), ["hoose", "owd", "goin'"]);
    }
}

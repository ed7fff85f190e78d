//! Rule-based grapheme-to-phoneme conversion for writing that follows the sound (dialectal
//! transcripts), from an ordered rule file in isogloss's own TOML format.
//!
//! # The rule file
//!
//! ```toml
//! # Letters are compared after lower-casing (set `lowercase = false` to keep case).
//! lowercase = true
//!
//! # Named classes of letters (or letter sequences); `vowel` is the class that the
//! # `before-vowel` / `after-vowel` conditions use.
//! [classes]
//! vowel = ["a", "e", "i", "o", "u"]
//! front = ["e", "i", "y"]
//!
//! [[rule]]
//! graphemes = "sch"        # the letter sequence this rule consumes
//! phonemes = "S K"         # phoneme symbols, space-separated; "" = silent
//! where = "word-start"     # optional: word-start | word-end | before-vowel | after-vowel,
//!                          # or a list that must all hold: ["word-start", "word-end"] makes
//!                          # a whole-word rule (for irregular function words)
//!
//! [[rule]]
//! graphemes = "c"
//! phonemes = "S"
//! before = "front"         # optional: the next letters belong to this class
//! # after = "vowel"        # optional: the previous letters belong to this class
//! ```
//!
//! A word is read left to right. At each position the rules whose letters match there and whose
//! conditions all hold compete: the longest letter sequence wins, ties go to the rule that comes
//! first in the file — so list a conditional rule before the general rule for the same letters.
//! When no rule matches, the letter is an *unknown grapheme*: the word gets
//! no pronunciation and is reported with every letter no rule covered — never silently dropped.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

use serde::Deserialize;
use unicode_normalization::UnicodeNormalization;

use crate::{Lexicon, LexiconError};

/// Where a rule may apply, relative to the word and its neighbouring letters.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Condition {
    /// The match starts the word.
    WordStart,
    /// The match ends the word.
    WordEnd,
    /// The letters right after the match begin with a member of the class (index into the
    /// rule set's classes).
    Before(usize),
    /// The letters right before the match end with a member of the class.
    After(usize),
}

/// One rewrite rule: a letter sequence, its phonemes and the conditions that must all hold.
#[derive(Debug, Clone)]
pub struct Rule {
    /// The letters it consumes (at least one).
    pub graphemes: Vec<char>,
    /// The phoneme symbols it emits (possibly none: a silent letter).
    pub phonemes: Vec<String>,
    /// Conditions, all of which must hold.
    pub conditions: Vec<Condition>,
    /// 1-based line of the rule in its file, for messages.
    pub line: usize,
}

/// A named set of letter sequences.
#[derive(Debug, Clone)]
pub struct LetterClass {
    /// Its name in the rule file.
    pub name: String,
    /// Its members, longest first.
    pub members: Vec<Vec<char>>,
}

/// An ordered set of rules, ready to apply.
#[derive(Debug, Clone)]
pub struct RuleSet {
    lowercase: bool,
    classes: Vec<LetterClass>,
    rules: Vec<Rule>,
    /// Rule indices by first letter, longest first, then file order: the first candidate whose
    /// letters and conditions match is the winner.
    by_first_letter: HashMap<char, Vec<usize>>,
}

/// Why a word got no pronunciation from the rules.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum RuleFailure {
    /// No rule covers these letters; each is `(0-based letter position, letter)`.
    UnknownGraphemes(Vec<(usize, char)>),
    /// The word has no letter at all (e.g. a lone apostrophe or a number).
    NoLetters,
    /// Every letter was covered, but only by silent rules.
    NoPhonemes,
}

impl std::fmt::Display for RuleFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            RuleFailure::UnknownGraphemes(letters) => {
                let listed: Vec<String> = letters
                    .iter()
                    .map(|(position, letter)| format!("`{letter}` at letter {}", position + 1))
                    .collect();
                write!(f, "no rule covers {}", listed.join(", "))
            }
            RuleFailure::NoLetters => write!(f, "expected at least one letter, found none"),
            RuleFailure::NoPhonemes => {
                write!(f, "the rules made every letter silent, leaving no phoneme")
            }
        }
    }
}

/// A word the rules could not convert, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UncoveredWord {
    /// The word as given.
    pub word: String,
    /// What went wrong.
    pub failure: RuleFailure,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRuleFile {
    #[serde(default = "yes")]
    lowercase: bool,
    #[serde(default)]
    classes: BTreeMap<String, Vec<String>>,
    #[serde(default)]
    rule: Vec<toml::Spanned<RawRule>>,
}

fn yes() -> bool {
    true
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRule {
    graphemes: String,
    phonemes: String,
    #[serde(rename = "where")]
    position: Option<Where>,
    before: Option<String>,
    after: Option<String>,
}

/// `where = "word-start"` or several at once, `where = ["word-start", "word-end"]` (all hold).
#[derive(Deserialize)]
#[serde(untagged)]
enum Where {
    One(String),
    All(Vec<String>),
}

fn line_of(text: &str, offset: usize) -> usize {
    let bytes = text.as_bytes();
    bytes[..offset.min(bytes.len())]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

impl RuleSet {
    /// Reads and checks a rule file; syntax and content errors name the file and line.
    pub fn read(path: &Path) -> Result<RuleSet, LexiconError> {
        let text = isogloss_corpus::tsv::read_utf8(path)?;
        RuleSet::parse(&text, path)
    }

    /// Parses rule-file text; `path` is only used in messages.
    pub fn parse(text: &str, path: &Path) -> Result<RuleSet, LexiconError> {
        let error = |line: usize, message: String| LexiconError::Format {
            path: PathBuf::from(path),
            line,
            message,
        };
        let raw: RawRuleFile = toml::from_str(text).map_err(|e| {
            let line = e.span().map_or(1, |span| line_of(text, span.start));
            error(line, e.message().trim().to_string())
        })?;
        let lowercase = raw.lowercase;
        let normalize = |s: &str| -> Vec<char> {
            let composed: String = s.nfc().collect();
            if lowercase {
                composed.to_lowercase().chars().collect()
            } else {
                composed.chars().collect()
            }
        };
        let mut classes = Vec::new();
        for (name, members) in &raw.classes {
            let mut members: Vec<Vec<char>> = members.iter().map(|m| normalize(m)).collect();
            if members.iter().any(Vec::is_empty) || members.is_empty() {
                let line = text
                    .lines()
                    .position(|l| l.trim_start().starts_with(name.as_str()))
                    .map_or(1, |i| i + 1);
                return Err(error(
                    line,
                    format!("class `{name}`: expected a list of non-empty letter sequences"),
                ));
            }
            members.sort_by_key(|m| std::cmp::Reverse(m.len()));
            classes.push(LetterClass {
                name: name.clone(),
                members,
            });
        }
        let class_index = |name: &str, line: usize| -> Result<usize, LexiconError> {
            classes.iter().position(|c| c.name == name).ok_or_else(|| {
                let known: Vec<&str> = classes.iter().map(|c| c.name.as_str()).collect();
                error(
                    line,
                    format!(
                        "expected the name of a class defined under [classes], found `{name}` \
                         (defined: {})",
                        if known.is_empty() {
                            "none".to_string()
                        } else {
                            known.join(", ")
                        }
                    ),
                )
            })
        };
        let mut rules = Vec::new();
        for spanned in &raw.rule {
            let line = line_of(text, spanned.span().start);
            let raw_rule = spanned.get_ref();
            let graphemes = normalize(&raw_rule.graphemes);
            if graphemes.is_empty() {
                return Err(error(
                    line,
                    "expected `graphemes` to hold at least one letter, found an empty string"
                        .into(),
                ));
            }
            let mut conditions = Vec::new();
            let positions: Vec<&str> = match &raw_rule.position {
                None => Vec::new(),
                Some(Where::One(one)) => vec![one.as_str()],
                Some(Where::All(all)) => all.iter().map(String::as_str).collect(),
            };
            for position in positions {
                conditions.push(match position {
                    "word-start" => Condition::WordStart,
                    "word-end" => Condition::WordEnd,
                    "before-vowel" => Condition::Before(class_index("vowel", line)?),
                    "after-vowel" => Condition::After(class_index("vowel", line)?),
                    other => {
                        return Err(error(
                            line,
                            format!(
                                "expected `where` to be word-start, word-end, before-vowel or \
                                 after-vowel, found `{other}`"
                            ),
                        ))
                    }
                });
            }
            if let Some(class) = &raw_rule.before {
                conditions.push(Condition::Before(class_index(class, line)?));
            }
            if let Some(class) = &raw_rule.after {
                conditions.push(Condition::After(class_index(class, line)?));
            }
            rules.push(Rule {
                graphemes,
                phonemes: raw_rule
                    .phonemes
                    .split_whitespace()
                    .map(str::to_string)
                    .collect(),
                conditions,
                line,
            });
        }
        if rules.is_empty() {
            return Err(error(
                1,
                "expected at least one [[rule]] table, found none".into(),
            ));
        }
        let mut by_first_letter: HashMap<char, Vec<usize>> = HashMap::new();
        for (index, rule) in rules.iter().enumerate() {
            by_first_letter
                .entry(rule.graphemes[0])
                .or_default()
                .push(index);
        }
        for candidates in by_first_letter.values_mut() {
            // Stable sort: equal lengths keep file order.
            candidates.sort_by_key(|&i| std::cmp::Reverse(rules[i].graphemes.len()));
        }
        Ok(RuleSet {
            lowercase,
            classes,
            rules,
            by_first_letter,
        })
    }

    /// The rules in file order.
    pub fn rules(&self) -> &[Rule] {
        &self.rules
    }

    /// The letter classes.
    pub fn classes(&self) -> &[LetterClass] {
        &self.classes
    }

    fn holds(&self, condition: &Condition, letters: &[char], start: usize, end: usize) -> bool {
        match condition {
            Condition::WordStart => start == 0,
            Condition::WordEnd => end == letters.len(),
            Condition::Before(class) => self.classes[*class]
                .members
                .iter()
                .any(|m| letters[end..].starts_with(m)),
            Condition::After(class) => self.classes[*class]
                .members
                .iter()
                .any(|m| letters[..start].ends_with(m)),
        }
    }

    /// The phonemes of one word, or why there are none.
    pub fn pronounce(&self, word: &str) -> Result<Vec<String>, RuleFailure> {
        let composed: String = word.nfc().collect();
        if !composed.chars().any(char::is_alphabetic) {
            return Err(RuleFailure::NoLetters);
        }
        let letters: Vec<char> = if self.lowercase {
            composed.to_lowercase().chars().collect()
        } else {
            composed.chars().collect()
        };
        let mut phonemes = Vec::new();
        let mut unknown = Vec::new();
        let mut position = 0;
        while position < letters.len() {
            let winner = self
                .by_first_letter
                .get(&letters[position])
                .into_iter()
                .flatten()
                .map(|&i| &self.rules[i])
                .find(|rule| {
                    let end = position + rule.graphemes.len();
                    letters[position..].starts_with(&rule.graphemes)
                        && rule
                            .conditions
                            .iter()
                            .all(|c| self.holds(c, &letters, position, end))
                });
            match winner {
                Some(rule) => {
                    phonemes.extend(rule.phonemes.iter().cloned());
                    position += rule.graphemes.len();
                }
                None => {
                    unknown.push((position, letters[position]));
                    position += 1;
                }
            }
        }
        if !unknown.is_empty() {
            Err(RuleFailure::UnknownGraphemes(unknown))
        } else if phonemes.is_empty() {
            Err(RuleFailure::NoPhonemes)
        } else {
            Ok(phonemes)
        }
    }

    /// Converts a word list: a lexicon of every word the rules cover, and the words they do not,
    /// each with its reason (in input order).
    pub fn lexicon<'a>(
        &self,
        words: impl IntoIterator<Item = &'a str>,
    ) -> (Lexicon, Vec<UncoveredWord>) {
        let mut entries = Vec::new();
        let mut uncovered = Vec::new();
        for word in words {
            match self.pronounce(word) {
                Ok(phonemes) => {
                    entries.push((word.to_string(), phonemes));
                }
                Err(failure) => uncovered.push(UncoveredWord {
                    word: word.to_string(),
                    failure,
                }),
            }
        }
        (Lexicon::from_entries(entries), uncovered)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rules(text: &str) -> RuleSet {
        RuleSet::parse(text, Path::new("test.toml")).unwrap()
    }

    fn phonemes(set: &RuleSet, word: &str) -> String {
        set.pronounce(word).unwrap().join(" ")
    }

    const LETTERS: &str = r#"
[classes]
vowel = ["a", "e", "i", "o", "u"]
front = ["e", "i"]

[[rule]]
graphemes = "a"
phonemes = "AE"
[[rule]]
graphemes = "e"
phonemes = "EH"
[[rule]]
graphemes = "i"
phonemes = "IH"
[[rule]]
graphemes = "o"
phonemes = "AA"
[[rule]]
graphemes = "u"
phonemes = "AH"
[[rule]]
graphemes = "n"
phonemes = "N"
[[rule]]
graphemes = "t"
phonemes = "T"
[[rule]]
graphemes = "s"
phonemes = "S"
[[rule]]
graphemes = "c"
phonemes = "K"
[[rule]]
graphemes = "h"
phonemes = "HH"
"#;

    #[test]
    fn longest_match_beats_shorter_and_ties_go_to_file_order() {
        let set = rules(&format!(
            "{LETTERS}
[[rule]]
graphemes = \"sch\"
phonemes = \"SH\"
[[rule]]
graphemes = \"ch\"
phonemes = \"CH\"
[[rule]]
graphemes = \"ch\"
phonemes = \"K\"
"
        ));
        // "sch" (3 letters) beats "s" then "ch"; a later rule listed after "s" still wins by length.
        assert_eq!(phonemes(&set, "schan"), "SH AE N");
        // Two "ch" rules of equal length: the first in the file wins.
        assert_eq!(phonemes(&set, "chat"), "CH AE T");
        assert_eq!(phonemes(&set, "cat"), "K AE T");
    }

    #[test]
    fn word_start_and_word_end_conditions() {
        let set = rules(&format!(
            "[[rule]]
graphemes = \"h\"
phonemes = \"\"
where = \"word-start\"
[[rule]]
graphemes = \"e\"
phonemes = \"\"
where = \"word-end\"
{LETTERS}"
        ));
        // An initial "h" is silent (h-dropping); elsewhere the plain rule applies.
        assert_eq!(phonemes(&set, "hat"), "AE T");
        assert_eq!(phonemes(&set, "ahat"), "AE HH AE T");
        // A final "e" is silent, a medial one is not.
        assert_eq!(phonemes(&set, "tone"), "T AA N");
        assert_eq!(phonemes(&set, "ten"), "T EH N");

        let whole_word = rules(&format!(
            "[[rule]]
graphemes = \"the\"
phonemes = \"DH AH\"
where = [\"word-start\", \"word-end\"]
{LETTERS}"
        ));
        assert_eq!(phonemes(&whole_word, "the"), "DH AH");
        assert_eq!(phonemes(&whole_word, "then"), "T HH EH N");
        assert_eq!(phonemes(&whole_word, "athe"), "AE T HH EH");
    }

    #[test]
    fn vowel_and_class_conditions_look_at_the_neighbouring_letters() {
        let set = rules(&format!(
            "[[rule]]
graphemes = \"s\"
phonemes = \"Z\"
where = \"after-vowel\"
[[rule]]
graphemes = \"t\"
phonemes = \"DX\"
where = \"before-vowel\"
[[rule]]
graphemes = \"c\"
phonemes = \"S\"
before = \"front\"
[[rule]]
graphemes = \"n\"
phonemes = \"NG\"
after = \"front\"
{LETTERS}"
        ));
        assert_eq!(phonemes(&set, "as"), "AE Z");
        assert_eq!(phonemes(&set, "sa"), "S AE");
        assert_eq!(phonemes(&set, "ata"), "AE DX AE");
        assert_eq!(phonemes(&set, "at"), "AE T");
        assert_eq!(phonemes(&set, "ci"), "S IH");
        assert_eq!(phonemes(&set, "ca"), "K AE");
        assert_eq!(phonemes(&set, "in"), "IH NG");
        assert_eq!(phonemes(&set, "an"), "AE N");
    }

    #[test]
    fn lowercasing_is_on_by_default() {
        let set = rules(LETTERS);
        assert_eq!(phonemes(&set, "CAT"), "K AE T");
    }

    #[test]
    fn unknown_graphemes_are_reported_with_the_word() {
        let set = rules(LETTERS);
        let (lexicon, uncovered) = set.lexicon(["cat", "quiz", "'", "hat"]);
        assert_eq!(lexicon.words(), ["cat", "hat"]);
        assert_eq!(
            uncovered,
            [
                UncoveredWord {
                    word: "quiz".into(),
                    failure: RuleFailure::UnknownGraphemes(vec![(0, 'q'), (3, 'z')]),
                },
                UncoveredWord {
                    word: "'".into(),
                    failure: RuleFailure::NoLetters,
                },
            ]
        );
        assert_eq!(
            uncovered[0].failure.to_string(),
            "no rule covers `q` at letter 1, `z` at letter 4"
        );
    }

    #[test]
    fn syntax_errors_name_the_line() {
        let text = "[classes]\nvowel = [\"a\"]\n\n[[rule]]\ngraphemes = \"a\"\nphonemes = AE\n";
        let error = RuleSet::parse(text, Path::new("dialect.toml"))
            .unwrap_err()
            .to_string();
        assert!(error.starts_with("dialect.toml, line 6:"), "{error}");
    }

    #[test]
    fn content_errors_name_the_rule_line() {
        let text = "[[rule]]\ngraphemes = \"a\"\nphonemes = \"AE\"\n\n[[rule]]\ngraphemes = \"b\"\nphonemes = \"B\"\nwhere = \"before-vowel\"\n";
        let error = RuleSet::parse(text, Path::new("r.toml"))
            .unwrap_err()
            .to_string();
        assert!(error.starts_with("r.toml, line 5:"), "{error}");
        assert!(error.contains("`vowel`"), "{error}");

        let text = "[[rule]]\ngraphemes = \"a\"\nphonemes = \"AE\"\nwhere = \"middle\"\n";
        let error = RuleSet::parse(text, Path::new("r.toml"))
            .unwrap_err()
            .to_string();
        assert!(error.contains("found `middle`"), "{error}");

        let text = "[[rule]]\ngraphemes = \"\"\nphonemes = \"AE\"\n";
        assert!(RuleSet::parse(text, Path::new("r.toml")).is_err());
        assert!(RuleSet::parse("lowercase = true\n", Path::new("r.toml")).is_err());
    }
}

//! The scoring token rules (`docs/scoring.md`): NFC, lower case, every Unicode punctuation
//! character except apostrophe and hyphen replaced by a space, split on white space.

use unicode_normalization::UnicodeNormalization;
use unicode_properties::{GeneralCategoryGroup, UnicodeGeneralCategory};

/// Which parts of the token rules apply. `Default` is the documented rule set: everything on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct TokenRules {
    /// Compose to Unicode normalization form C, so that `ï` typed as `i` + combining diaeresis
    /// and `ï` typed precomposed are one word.
    pub nfc: bool,
    /// Fold to lower case (Unicode full case mapping).
    pub lowercase: bool,
    /// Replace punctuation (general category P*) other than apostrophes and hyphens by a space.
    pub strip_punctuation: bool,
}

impl Default for TokenRules {
    fn default() -> Self {
        TokenRules {
            nfc: true,
            lowercase: true,
            strip_punctuation: true,
        }
    }
}

/// Apostrophes and hyphens that stay inside words. Besides the ASCII apostrophe and
/// hyphen-minus we keep their typographic forms (U+2019 as typed by word processors for an
/// apostrophe, U+2010 hyphen, U+2011 non-breaking hyphen), because dialect transcripts are often
/// written in word processors and an elision like `o’er` must not split into two words.
/// U+02BC (modifier letter apostrophe) is a letter, not punctuation, so it stays anyway.
const KEPT_PUNCTUATION: [char; 5] = ['\'', '\u{2019}', '-', '\u{2010}', '\u{2011}'];

/// Whether the token rules replace this character by a space.
fn is_separating_punctuation(c: char) -> bool {
    c.general_category_group() == GeneralCategoryGroup::Punctuation
        && !KEPT_PUNCTUATION.contains(&c)
}

/// Applies NFC and lower case (as far as `rules` ask) to one word, without splitting it. Used
/// for words that come from a variants file, so that they compare equal to scored tokens.
pub fn normalize_word(word: &str, rules: &TokenRules) -> String {
    let composed: String = if rules.nfc {
        word.nfc().collect()
    } else {
        word.to_string()
    };
    if rules.lowercase {
        composed.to_lowercase()
    } else {
        composed
    }
}

/// Splits a transcript into scoring tokens following `rules`.
///
/// ```
/// use isogloss_score::{tokenize, TokenRules};
/// let words = tokenize("Fête, mornin’ o’er «at» Fell-Side!", &TokenRules::default());
/// assert_eq!(words, ["fête", "mornin’", "o’er", "at", "fell-side"]);
/// ```
pub fn tokenize(text: &str, rules: &TokenRules) -> Vec<String> {
    let mut text = normalize_word(text, rules);
    if rules.strip_punctuation {
        text = text
            .chars()
            .map(|c| if is_separating_punctuation(c) { ' ' } else { c })
            .collect();
    }
    text.split_whitespace().map(str::to_string).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_rules_fold_case_compose_and_split_on_punctuation() {
        // "i" + U+0308 combining diaeresis composes to U+00EF under NFC (Unicode Standard Annex #15).
        let words = tokenize(
            "Nai\u{308}ve. «Hoose»;  fell-side's\tu¿q",
            &TokenRules::default(),
        );
        assert_eq!(words, ["na\u{ef}ve", "hoose", "fell-side's", "u", "q"]);
    }

    #[test]
    fn every_part_can_be_turned_off() {
        let rules = TokenRules {
            nfc: false,
            lowercase: false,
            strip_punctuation: false,
        };
        assert_eq!(
            tokenize("Nai\u{308}ve, Hoose", &rules),
            ["Nai\u{308}ve,", "Hoose"]
        );
    }

    #[test]
    fn symbols_and_digits_are_not_punctuation() {
        // `+` is Sm and `€` is Sc in the Unicode general categories, not P*.
        assert_eq!(tokenize("3+4 €", &TokenRules::default()), ["3+4", "€"]);
    }

    #[test]
    fn empty_and_punctuation_only_texts_have_no_tokens() {
        assert!(tokenize("", &TokenRules::default()).is_empty());
        assert!(tokenize(" ... !? ", &TokenRules::default()).is_empty());
    }
}

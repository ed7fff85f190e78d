//! Which hypothesis words are right: the hypothesis tokens of a segment aligned with its
//! reference transcript by the scoring aligner, after the scoring token rules.

use isogloss_decoder::output::TimedWord;
use isogloss_score::{align, tokenize, Edit, TokenRules, VariantMap};

/// A hypothesis word's certainty and whether it is right.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WordOutcome {
    /// The decoder's certainty in (0, 1].
    pub certainty: f32,
    /// Whether the word matched the reference (exactly, or as a permissible variant when a
    /// variant map was given).
    pub correct: bool,
}

/// One outcome per hypothesis word of `words`, by the minimum-cost alignment with `reference`
/// that scoring uses. A word is right when it is aligned as correct (or as a variant, when
/// `variants` has entries); substitutions and insertions are wrong. A word that the token rules
/// split into several tokens (`fell,side`) is right only when all its tokens are; a word they
/// erase (bare punctuation) has no outcome.
pub fn word_outcomes(
    reference: &str,
    words: &[TimedWord],
    variants: &VariantMap,
    rules: &TokenRules,
) -> Vec<WordOutcome> {
    let reference = tokenize(reference, rules);
    let mut tokens = Vec::new();
    let mut owner = Vec::new();
    for (i, word) in words.iter().enumerate() {
        for token in tokenize(&word.word, rules) {
            tokens.push(token);
            owner.push(i);
        }
    }
    let mut right = vec![None::<bool>; words.len()];
    for step in align(&reference, &tokens, variants).steps {
        if let Some(h) = step.hypothesis {
            let ok = matches!(step.edit, Edit::Correct | Edit::Variant);
            let slot = &mut right[owner[h]];
            *slot = Some(slot.unwrap_or(true) && ok);
        }
    }
    words
        .iter()
        .zip(right)
        .filter_map(|(word, correct)| {
            correct.map(|correct| WordOutcome {
                certainty: word.confidence,
                correct,
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn words(text: &str) -> Vec<TimedWord> {
        text.split(' ')
            .enumerate()
            .map(|(i, w)| TimedWord {
                word: w.to_string(),
                start: i as f64,
                end: i as f64 + 0.5,
                confidence: 0.1 * (i + 1) as f32,
            })
            .collect()
    }

    #[test]
    fn substitutions_and_insertions_are_wrong_variants_right_when_forgiven() {
        let hyp = words("we minded auld extra nets,side");
        let plain = word_outcomes(
            "We mended owd nets side",
            &hyp,
            &VariantMap::new(),
            &TokenRules::default(),
        );
        let right: Vec<bool> = plain.iter().map(|o| o.correct).collect();
        assert_eq!(right, [true, false, false, false, true]);
        assert_eq!(plain[4].certainty, 0.5);
        let mut variants = VariantMap::new();
        variants.insert("owd", "old");
        variants.insert("auld", "old");
        let flexible = word_outcomes(
            "we mended owd nets side",
            &hyp,
            &variants,
            &TokenRules::default(),
        );
        assert!(flexible[2].correct);
    }
}

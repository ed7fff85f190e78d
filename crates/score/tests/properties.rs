//! Properties of flexible scoring that must hold for any input.

use isogloss_score::{align, Edit, VariantMap};
use proptest::prelude::*;

/// A small vocabulary makes repeated words, matches and variant pairs likely.
fn words(max: usize) -> impl Strategy<Value = Vec<String>> {
    prop::collection::vec((0u8..8).prop_map(|w| format!("w{w}")), 0..max)
}

/// A random variant map: pairs (variant, normalized form) over the same vocabulary plus a few
/// normalized forms that never occur in transcripts.
fn variant_map() -> impl Strategy<Value = VariantMap> {
    prop::collection::vec((0u8..8, 0u8..10), 0..12).prop_map(|pairs| {
        let mut map = VariantMap::new();
        for (variant, normalized) in pairs {
            map.insert(&format!("w{variant}"), &format!("n{normalized}"));
        }
        map
    })
}

proptest! {
    #[test]
    fn flexible_wer_never_exceeds_wer(
        reference in words(12),
        hypothesis in words(12),
        variants in variant_map(),
    ) {
        let plain = align(&reference, &hypothesis, &VariantMap::new()).counts();
        let flexible = align(&reference, &hypothesis, &variants).counts();
        prop_assert!(flexible.errors() <= plain.errors());
        prop_assert_eq!(flexible.ref_words, plain.ref_words);
        prop_assert_eq!(flexible.hyp_words(), plain.hyp_words());
    }

    #[test]
    fn a_map_of_words_that_never_occur_changes_nothing(
        reference in words(12),
        hypothesis in words(12),
        unused in prop::collection::vec((0u8..8, 0u8..4), 0..12),
    ) {
        let mut variants = VariantMap::new();
        for (variant, normalized) in unused {
            variants.insert(&format!("v{variant}"), &format!("n{normalized}"));
        }
        let plain = align(&reference, &hypothesis, &VariantMap::new());
        let flexible = align(&reference, &hypothesis, &variants);
        prop_assert_eq!(plain.counts().forgiven, 0);
        prop_assert_eq!(flexible.counts(), plain.counts());
    }

    #[test]
    fn forgiven_pairs_really_are_variants(
        reference in words(12),
        hypothesis in words(12),
        variants in variant_map(),
    ) {
        let alignment = align(&reference, &hypothesis, &variants);
        for step in &alignment.steps {
            if let (Some(r), Some(h)) = (step.reference, step.hypothesis) {
                let shared = variants.normalized_forms_of(&reference[r])
                    .iter()
                    .any(|form| variants.normalized_forms_of(&hypothesis[h]).contains(form));
                match step.edit {
                    Edit::Correct => prop_assert_eq!(&reference[r], &hypothesis[h]),
                    Edit::Variant => prop_assert!(reference[r] != hypothesis[h] && shared),
                    Edit::Substitution => prop_assert!(reference[r] != hypothesis[h] && !shared),
                    Edit::Deletion | Edit::Insertion => prop_assert!(false, "pair step is {:?}", step.edit),
                }
            }
        }
    }
}

//! Mixing and pruning checks.

use crate::tests_estimate::{check_sum_to_one, generated_text};
use crate::{
    estimate, estimate_weights, evaluate_sentences, merge, prune, ArpaModel, NgramCounts, Smoothing,
};

fn renamed(text: Vec<Vec<String>>, prefix: &str) -> Vec<Vec<String>> {
    text.into_iter()
        .map(|sentence| {
            sentence
                .into_iter()
                .map(|word| word.replacen('w', prefix, 1))
                .collect()
        })
        .collect()
}

fn model(text: Vec<Vec<String>>, order: usize, smoothing: Smoothing) -> ArpaModel {
    estimate(
        &NgramCounts::from_sentences(text, order).unwrap(),
        smoothing,
    )
    .unwrap()
    .model
}

#[test]
fn merged_model_equals_the_mixture_on_the_tuning_text_and_beats_each_component() {
    // Two "domains" sharing part of their vocabulary; the tuning text mixes both.
    let first = generated_text(21, 80, 10);
    let second = renamed(generated_text(22, 80, 10), "v");
    let mut tuning = renamed(generated_text(23, 15, 12), "v");
    tuning.extend(generated_text(24, 15, 12));
    tuning.push(vec!["w1".into(), "v1".into(), "unheard".into()]);
    let models = [
        model(first, 3, Smoothing::ModifiedKneserNey),
        model(second, 2, Smoothing::WittenBell),
    ];
    let estimated = estimate_weights(&models, &tuning).unwrap();
    assert!((estimated.weights.iter().sum::<f64>() - 1.0).abs() < 1e-12);
    let merged = merge(&models, &estimated.weights, &tuning).unwrap();
    let merged_score = evaluate_sentences(&merged, tuning.clone());
    assert_eq!(merged_score.tokens, estimated.tuning.tokens);
    assert!(
        (merged_score.log10_probability - estimated.tuning.log10_probability).abs()
            < 1e-9 * estimated.tuning.log10_probability.abs(),
        "merged {} vs mixture {}",
        merged_score.log10_probability,
        estimated.tuning.log10_probability
    );
    for component in &models {
        let alone = evaluate_sentences(component, tuning.clone());
        assert!(
            merged_score.perplexity() <= alone.perplexity(),
            "{} > {}",
            merged_score.perplexity(),
            alone.perplexity()
        );
    }
    check_sum_to_one(&merged, "merged");
}

#[test]
fn pruning_removes_ngrams_and_keeps_sum_to_one() {
    let text = generated_text(31, 150, 10);
    let full = model(text.clone(), 3, Smoothing::ModifiedKneserNey);
    let pruned = prune(&full, 1e-4).unwrap();
    let before = full.ngram_counts();
    let after = pruned.ngram_counts();
    assert_eq!(before[0], after[0], "unigrams always stay");
    assert!(
        after[2] < before[2] && after[1] <= before[1],
        "{before:?} → {after:?}"
    );
    check_sum_to_one(&pruned, "pruned");
    // Pruning trades likelihood for size: the training text cannot become more likely.
    let full_score = evaluate_sentences(&full, text.clone());
    let pruned_score = evaluate_sentences(&pruned, text);
    assert!(pruned_score.perplexity() >= full_score.perplexity());
    // A huge threshold prunes every n-gram above the unigrams.
    let everything = prune(&full, f64::MAX).unwrap();
    assert_eq!(everything.ngram_counts()[1..], [0, 0]);
    check_sum_to_one(&everything, "pruned to unigrams");
    assert!(prune(&full, -1.0).is_err());
}

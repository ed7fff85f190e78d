//! Estimation checks: sum-to-one through the ARPA back-off query, a hand-worked modified
//! Kneser-Ney example, back-off form equal to interpolated form, bad input.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::{
    estimate, estimate_with, evaluate_sentences, ArpaModel, EstimateOptions, LmError, NgramCounts,
    Smoothing, WordIndex,
};

/// Random text over a small Zipf-like vocabulary, so that contexts repeat and all count classes
/// occur; seeded, so every run checks the same models.
pub(crate) fn generated_text(seed: u64, sentences: usize, vocabulary: usize) -> Vec<Vec<String>> {
    let mut random = ChaCha8Rng::seed_from_u64(seed);
    let weights: Vec<f64> = (1..=vocabulary).map(|rank| 1.0 / rank as f64).collect();
    let total: f64 = weights.iter().sum();
    (0..sentences)
        .map(|_| {
            let length = random.random_range(1..=7);
            (0..length)
                .map(|_| {
                    let mut target = random.random::<f64>() * total;
                    let mut word = 0;
                    while word + 1 < vocabulary && target >= weights[word] {
                        target -= weights[word];
                        word += 1;
                    }
                    format!("w{word}")
                })
                .collect()
        })
        .collect()
}

const METHODS: [Smoothing; 4] = [
    Smoothing::ModifiedKneserNey,
    Smoothing::KneserNey,
    Smoothing::WittenBell,
    Smoothing::Additive { k: 0.5 },
];

/// Σ_w P(w | h) over every predictable word, through the back-off recursion of the model.
pub(crate) fn check_sum_to_one(model: &ArpaModel, label: &str) {
    let words: Vec<WordIndex> = model.predictable_words().collect();
    let mut contexts: Vec<Vec<WordIndex>> = vec![Vec::new()];
    let counts = model.ngram_counts();
    let mut ngram = Vec::new();
    for n in 1..model.order() {
        for id in 0..counts[n - 1] as u32 {
            model.ngram_words(n, id, &mut ngram);
            contexts.push(ngram.iter().map(|&word| WordIndex(word)).collect());
        }
    }
    for context in &contexts {
        let total: f64 = words
            .iter()
            .map(|&word| 10f64.powf(model.log10_probability(context, word)))
            .sum();
        // The defining property of a probability distribution (textbook definition).
        assert!(
            (total - 1.0).abs() < 1e-6,
            "{label}: context {context:?} sums to {total}"
        );
    }
}

#[test]
fn every_context_sums_to_one_for_every_method_and_order() {
    let folder = tempfile::tempdir().unwrap();
    for (seed, order) in [(1u64, 1usize), (2, 2), (3, 3), (4, 4), (5, 5)] {
        let text = generated_text(seed, 60, 9);
        let counts = NgramCounts::from_sentences(text, order).unwrap();
        for smoothing in METHODS {
            for cutoffs in [vec![], vec![1, 2, 2, 2, 2]] {
                let label = format!("order {order}, {smoothing:?}, cut-offs {cutoffs:?}");
                let estimated = estimate_with(
                    &counts,
                    &EstimateOptions {
                        smoothing,
                        cutoffs,
                        keep_interpolated: false,
                    },
                )
                .unwrap();
                // Through the written file, so the ARPA text keeps enough precision too.
                let path = folder.path().join("model.arpa");
                estimated.model.write_arpa(&path).unwrap();
                check_sum_to_one(&ArpaModel::read(&path).unwrap(), &label);
            }
        }
    }
}

#[test]
fn back_off_form_equals_interpolated_form() {
    let training = generated_text(11, 80, 12);
    let mut test = generated_text(12, 30, 14); // w12, w13 never occur in training: OOVs
    test.push(vec!["unseen".to_string(), "w0".to_string()]);
    for order in 1..=4 {
        let counts = NgramCounts::from_sentences(training.clone(), order).unwrap();
        for smoothing in METHODS {
            let estimated = estimate_with(
                &counts,
                &EstimateOptions {
                    smoothing,
                    cutoffs: vec![1, 1, 2, 2],
                    keep_interpolated: true,
                },
            )
            .unwrap();
            let arpa = evaluate_sentences(&estimated.model, test.clone());
            let mut interpolated = 0.0;
            for sentence in &test {
                let mut history = vec!["<s>"];
                for word in sentence.iter().map(String::as_str).chain(["</s>"]) {
                    interpolated += estimated
                        .interpolated
                        .as_ref()
                        .unwrap()
                        .log10_probability(&history, word);
                    history.push(word);
                }
            }
            assert!(arpa.oov_words > 0);
            assert!(
                (arpa.log10_probability - interpolated).abs() < 1e-9 * interpolated.abs(),
                "order {order} {smoothing:?}: back-off {} vs interpolated {interpolated}",
                arpa.log10_probability
            );
        }
    }
}

fn words(line: &str) -> Vec<String> {
    line.split_whitespace().map(str::to_string).collect()
}

#[test]
fn hand_worked_modified_kneser_ney_bigram() {
    // Corpus: "a" ×4, "b" ×3, "c" ×2, "d e" ×1, bigram model.
    let mut text = Vec::new();
    for (line, times) in [("a", 4), ("b", 3), ("c", 2), ("d e", 1)] {
        text.extend(std::iter::repeat_n(words(line), times));
    }
    let counts = NgramCounts::from_sentences(text, 2).unwrap();
    // Highest order: raw counts. <s> a 4, a </s> 4, <s> b 3, b </s> 3, <s> c 2, c </s> 2,
    // <s> d 1, d e 1, e </s> 1 → n1 = 3, n2 = 2, n3 = 2, n4 = 2.
    assert_eq!(counts.kneser_ney_count(&["<s>", "a"]), 4);
    // Unigrams: continuation counts N1+(• w): </s> follows a, b, c and e → 4; every other word 1.
    assert_eq!(counts.kneser_ney_count(&["</s>"]), 4);
    assert_eq!(counts.kneser_ney_count(&["e"]), 1);
    let estimated = estimate(&counts, Smoothing::ModifiedKneserNey).unwrap();
    // Chen & Goodman (1998), modified Kneser-Ney discount estimates (formulas quoted from memory
    // of the paper): Y = n1/(n1+2 n2) = 3/7; D1 = 1 − 2Y n2/n1 = 1 − 4/7 = 3/7;
    // D2 = 2 − 3Y n3/n2 = 2 − 9/7 = 5/7; D3+ = 3 − 4Y n4/n3 = 3 − 12/7 = 9/7.
    let bigram = estimated.discounts[1];
    assert!((bigram.d1 - 3.0 / 7.0).abs() < 1e-12);
    assert!((bigram.d2 - 5.0 / 7.0).abs() < 1e-12);
    assert!((bigram.d3_plus - 9.0 / 7.0).abs() < 1e-12);
    // Unigram continuation counts: five 1s and one 4 → n2 = 0: degenerate, Y = 5/5 = 1 is not in
    // (0, 1), so the documented fallback discount 0.5 applies, with a warning.
    assert!(estimated.discounts[0].d1 == 0.5 && estimated.discounts[0].d3_plus == 0.5);
    assert!(
        estimated
            .warnings
            .iter()
            .any(|warning| warning.starts_with("order 1:")),
        "{:?}",
        estimated.warnings
    );
    // Unigrams: |V| = {</s>, <unk>, a, b, c, d, e} = 7; total 9; kept mass 5·0.5 + 3.5 = 6;
    // γ(ε) = (9 − 6)/9 = 1/3. P(a) = 0.5/9 + (1/3)/7 = 13/126; P(</s>) = 3.5/9 + 1/21 = 55/126;
    // P(<unk>) = 1/21 = 6/126. (5·13 + 55 + 6 = 126.)
    let model = &estimated.model;
    let index = |word: &str| model.word_index(word).unwrap();
    let probability = |context: &[&str], word: &str| {
        let context: Vec<WordIndex> = context.iter().map(|word| index(word)).collect();
        10f64.powf(model.log10_probability(&context, index(word)))
    };
    assert!((probability(&[], "a") - 13.0 / 126.0).abs() < 1e-9);
    assert!((probability(&[], "</s>") - 55.0 / 126.0).abs() < 1e-9);
    assert!((probability(&[], "<unk>") - 6.0 / 126.0).abs() < 1e-9);
    // Context <s>: a 4, b 3, c 2, d 1, total 10; discounted 19/7 + 12/7 + 9/7 + 4/7 = 44/7;
    // γ(<s>) = (10 − 44/7)/10 = 13/35. P(a | <s>) = (19/7)/10 + 13/35 · 13/126 = 683/2205.
    assert!((probability(&["<s>"], "a") - 683.0 / 2205.0).abs() < 1e-9);
    // Context d: e 1; discounted 4/7; γ(d) = 3/7. P(e | d) = 4/7 + 3/7 · 13/126 = 181/294;
    // unseen: P(a | d) = 3/7 · 13/126 = 13/294, i.e. back-off weight 3/7 times P(a).
    assert!((probability(&["d"], "e") - 181.0 / 294.0).abs() < 1e-9);
    assert!((probability(&["d"], "a") - 13.0 / 294.0).abs() < 1e-9);
}

#[test]
fn bad_input_is_rejected_with_a_clear_message() {
    for order in [0, 7] {
        let error = NgramCounts::from_sentences(vec![words("a b")], order).unwrap_err();
        assert!(matches!(error, LmError::UnsupportedOrder { found, .. } if found == order));
    }
    let error = NgramCounts::from_sentences(Vec::<Vec<String>>::new(), 3).unwrap_err();
    assert!(error.to_string().contains("found none"), "{error}");
    let folder = tempfile::tempdir().unwrap();
    let empty = folder.path().join("empty.txt");
    std::fs::write(&empty, "\n  \n").unwrap();
    let error = NgramCounts::from_text_files(&[empty], 3, &Default::default()).unwrap_err();
    assert!(matches!(&error, LmError::Text { line: 2, .. }), "{error}");
    assert!(error.to_string().contains("empty text"), "{error}");
    let marked = folder.path().join("marked.txt");
    std::fs::write(&marked, "a b\nc </s> d\n").unwrap();
    let error = NgramCounts::from_text_files(&[marked], 3, &Default::default()).unwrap_err();
    assert!(matches!(&error, LmError::Text { line: 2, .. }), "{error}");
    let counts = NgramCounts::from_sentences(vec![words("a b")], 2).unwrap();
    assert!(estimate(&counts, Smoothing::Additive { k: 0.0 }).is_err());
}

#[test]
fn a_closed_vocabulary_maps_other_words_to_unk() {
    let options = crate::CountOptions {
        vocabulary: Some(words("a b zebra")),
    };
    let counts =
        NgramCounts::from_sentences_with(vec![words("a b c"), words("a d")], 2, &options).unwrap();
    assert_eq!(counts.raw_count(&["<unk>"]), 2);
    assert_eq!(counts.raw_count(&["a", "<unk>"]), 1);
    let model = estimate(&counts, Smoothing::ModifiedKneserNey)
        .unwrap()
        .model;
    // An unseen vocabulary word still gets a unigram (from the uniform base distribution).
    assert!(model.word_index("zebra").is_some());
    assert!(model.word_index("c").is_none());
}

#[test]
fn streamed_arpa_equals_the_built_model() {
    let counts = NgramCounts::from_sentences(generated_text(41, 50, 9), 4).unwrap();
    let folder = tempfile::tempdir().unwrap();
    for smoothing in METHODS {
        let options = EstimateOptions {
            smoothing,
            cutoffs: vec![1, 1, 2, 3],
            keep_interpolated: false,
        };
        let built = estimate_with(&counts, &options).unwrap();
        let path = folder.path().join("streamed.arpa.gz");
        let summary = crate::write_estimated_arpa(&counts, &options, &path).unwrap();
        assert_eq!(summary.ngram_counts, built.model.ngram_counts());
        let mut expected = Vec::new();
        built.model.write_arpa_to(&mut expected).unwrap();
        let mut streamed = Vec::new();
        ArpaModel::read(&path)
            .unwrap()
            .write_arpa_to(&mut streamed)
            .unwrap();
        assert!(expected == streamed, "{smoothing:?}");
    }
}

#[test]
fn fast_state_queries_agree_with_the_double_precision_recursion() {
    let counts = NgramCounts::from_sentences(generated_text(51, 120, 15), 5).unwrap();
    let model = estimate_with(
        &counts,
        &EstimateOptions {
            smoothing: Smoothing::ModifiedKneserNey,
            cutoffs: vec![1, 1, 1, 2, 2],
            keep_interpolated: false,
        },
    )
    .unwrap()
    .model;
    let unknown = model.unknown_word().unwrap();
    for sentence in generated_text(52, 40, 18) {
        let words: Vec<WordIndex> = sentence
            .iter()
            .map(|word| model.word_index(word).unwrap_or(unknown))
            .collect();
        let mut state = model.sentence_start();
        let mut history = vec![model.sentence_start_word().unwrap()];
        for &word in &words {
            let (fast, next) = model.score(&state, word);
            let slow = model.log10_probability(&history, word);
            // f32 storage of the fast path: agreement to single precision.
            assert!(
                (f64::from(fast) - slow).abs() < 1e-5 * slow.abs().max(1.0),
                "{fast} vs {slow}"
            );
            history.push(word);
            state = next;
        }
        let end = model.sentence_end_word().unwrap();
        let slow = model.log10_probability(&history, end);
        assert!((f64::from(model.sentence_end(&state)) - slow).abs() < 1e-5 * slow.abs().max(1.0));
    }
}

#[test]
fn smoothing_names_round_trip() {
    for name in Smoothing::NAMES {
        let smoothing = Smoothing::from_name(name, 0.5).unwrap();
        assert_eq!(smoothing.name(), name);
    }
    assert_eq!(
        Smoothing::from_name("add-k", 0.5),
        Some(Smoothing::Additive { k: 0.5 })
    );
    assert_eq!(Smoothing::from_name("mkn", 1.0), None);
}

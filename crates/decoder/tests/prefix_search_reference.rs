//! The prefix beam search with an ARPA language model against an independent Python reference
//! (`scripts/reference/prefix_search_reference.py`, fixture
//! `tests/fixtures/decoder/prefix_search_reference.json`), in all four word rules:
//!
//! * 40 tiny cases (3–7 frames) where the script enumerates every alignment and every reading,
//!   i.e. maximises the documented objective by brute force: the search with an unlimited beam
//!   must reach that maximum with one of the optimal readings, and its ten best hypotheses must
//!   have the ten best scores;
//! * 16 longer cases (25–40 frames) with beams of 2, 4 or 8, where the reference is the
//!   script's own prefix beam search (checked there against the enumeration): the search with
//!   the same beam and no other pruning must return the same five best hypotheses. The script
//!   keeps only cases without near ties (0.01) at the beam's cut and among those five.
//!
//! The random ARPA models have back-off weights on n-grams that are no one's prefix, unknown
//! words with and without `<unk>`, and a lexicon with homophones and second pronunciations.

use isogloss_decoder::{PrefixBeamSearch, SearchGraph, SearchOptions, WordRule, BOUNDARY_UNIT};
use isogloss_lm::ArpaModel;
use ndarray::Array2;
use serde_json::Value;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../tests/fixtures/decoder/prefix_search_reference.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn strings(value: &Value) -> Vec<String> {
    serde_json::from_value(value.clone()).unwrap()
}

/// The graph of a case. The fixture calls the boundary unit `<boundary>`; the graph gets the
/// decoder's own boundary symbol at that index (the blank's name does not matter).
fn graph_of(case: &Value) -> SearchGraph {
    let mut units = strings(&case["units"]);
    if let Some(boundary) = case["boundary"].as_u64() {
        units[boundary as usize] = BOUNDARY_UNIT.to_string();
    }
    let graph = match case["lexicon"].as_array() {
        Some(entries) => {
            let entries: Vec<(String, Vec<String>)> = entries
                .iter()
                .map(|entry| (entry[0].as_str().unwrap().to_string(), strings(&entry[1])))
                .collect();
            SearchGraph::with_lexicon(units, &entries).unwrap().0
        }
        None => SearchGraph::lexicon_free(units).unwrap(),
    };
    let rule = match case["rule"].as_str().unwrap() {
        "lexicon-at-boundary" => WordRule::LexiconAtBoundary,
        "lexicon-at-word-end" => WordRule::LexiconAtWordEnd,
        "spelled-at-boundary" => WordRule::SpelledAtBoundary,
        "every-unit" => WordRule::EveryUnit,
        other => panic!("unknown word rule {other}"),
    };
    assert_eq!(graph.word_rule(), rule, "{}", case["name"]);
    graph
}

fn posteriors_of(case: &Value) -> Array2<f32> {
    let rows: Vec<Vec<f32>> = serde_json::from_value(case["log_posteriors"].clone()).unwrap();
    let (frames, units) = (rows.len(), rows[0].len());
    Array2::from_shape_vec((frames, units), rows.concat()).unwrap()
}

fn options_of(case: &Value) -> SearchOptions {
    let weight = case["lm_weight"].as_f64().unwrap() as f32;
    let bonus = case["word_bonus"].as_f64().unwrap() as f32;
    let exact = SearchOptions::exact(weight, bonus);
    assert_eq!(
        f64::from(exact.unknown_word_score),
        case["unknown_word_score"].as_f64().unwrap()
    );
    match case["beam"].as_u64() {
        None => exact,
        Some(beam) => SearchOptions {
            beam: beam as usize,
            lookahead: false,
            ..exact
        },
    }
}

/// Score tolerance: the search adds and log-adds in float32 over up to 40 frames, the
/// reference in float64; 2e-6 relative, about 30 float32 roundings of the total (measured: at
/// most 1.6e-7 in the exact cases, 2.4e-7 in the beam cases).
fn tolerance(score: f64) -> f64 {
    2e-6 * score.abs().max(1.0)
}

fn labels_and_words(reading: &Value) -> (Vec<u32>, Vec<String>) {
    (
        serde_json::from_value(reading["labels"].clone()).unwrap(),
        strings(&reading["words"]),
    )
}

#[test]
fn unlimited_search_reaches_the_enumerated_maximum() {
    let fixture = fixture();
    let mut checked = 0;
    for case in fixture["cases"].as_array().unwrap() {
        if !case["beam"].is_null() {
            continue;
        }
        let name = case["name"].as_str().unwrap();
        let graph = graph_of(case);
        let lm = ArpaModel::read_from(case["arpa"].as_str().unwrap().as_bytes(), name).unwrap();
        let posteriors = posteriors_of(case);
        let top: Vec<f64> = serde_json::from_value(case["top_scores"].clone()).unwrap();
        let found = PrefixBeamSearch::new(&graph, &lm, options_of(case))
            .decode_nbest(posteriors.view(), top.len())
            .unwrap();
        assert_eq!(found.len(), top.len(), "{name}");
        for (rank, (ours, expected)) in found.iter().zip(&top).enumerate() {
            // Python enumeration of all alignments and readings (prefix_search_reference.py).
            assert!(
                (f64::from(ours.score) - expected).abs() < tolerance(*expected),
                "{name}, hypothesis {rank}: score {} vs enumeration {expected}",
                ours.score
            );
        }
        let best = &found[0];
        let words: Vec<String> = best.words.iter().map(|w| w.text.clone()).collect();
        let optimal: Vec<(Vec<u32>, Vec<String>)> = case["best"]
            .as_array()
            .unwrap()
            .iter()
            .map(labels_and_words)
            .collect();
        // One of the enumeration's optimal (labels, words) pairs.
        assert!(
            optimal.contains(&(best.units.clone(), words.clone())),
            "{name}: {:?} {words:?} is not among the optima {optimal:?}",
            best.units
        );
        checked += 1;
    }
    assert_eq!(checked, 40);
}

#[test]
fn pruned_search_keeps_what_the_reference_beam_search_keeps() {
    let fixture = fixture();
    let mut checked = 0;
    for case in fixture["cases"].as_array().unwrap() {
        if case["beam"].is_null() {
            continue;
        }
        let name = case["name"].as_str().unwrap();
        let graph = graph_of(case);
        let lm = ArpaModel::read_from(case["arpa"].as_str().unwrap().as_bytes(), name).unwrap();
        let posteriors = posteriors_of(case);
        let top = case["top"].as_array().unwrap();
        let found = PrefixBeamSearch::new(&graph, &lm, options_of(case))
            .decode_nbest(posteriors.view(), top.len())
            .unwrap();
        assert_eq!(found.len(), top.len(), "{name}");
        for (rank, (ours, expected)) in found.iter().zip(top).enumerate() {
            let (labels, words) = labels_and_words(expected);
            let score = expected["score"].as_f64().unwrap();
            let our_words: Vec<String> = ours.words.iter().map(|w| w.text.clone()).collect();
            // Python prefix beam search with the same beam (prefix_search_reference.py).
            assert_eq!(
                (&ours.units, &our_words),
                (&labels, &words),
                "{name}, hypothesis {rank}"
            );
            assert!(
                (f64::from(ours.score) - score).abs() < tolerance(score),
                "{name}, hypothesis {rank}: score {} vs reference {score}",
                ours.score
            );
        }
        checked += 1;
    }
    assert_eq!(checked, 16);
}

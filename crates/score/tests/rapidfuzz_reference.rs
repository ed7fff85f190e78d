//! Plain WER against an outside reference: word-level Levenshtein distances computed by
//! rapidfuzz (`rapidfuzz.distance.Levenshtein.distance` over token lists) on 240 generated
//! reference/hypothesis pairs, tokenized by an independent Python implementation of the token
//! rules. Fixture made by `scripts/reference/score_reference.py`.

use std::path::PathBuf;

use isogloss_score::{
    align, report, score_system, tokenize, Hypotheses, Hypothesis, Reference, ReferenceUtterance,
    ScoreOptions, TokenRules, VariantMap,
};

#[derive(serde::Deserialize)]
struct Pair {
    id: String,
    #[serde(rename = "ref")]
    reference: String,
    #[serde(rename = "hyp")]
    hypothesis: String,
    ref_tokens: Vec<String>,
    hyp_tokens: Vec<String>,
    distance: u64,
}

#[derive(serde::Deserialize)]
struct Fixture {
    total_distance: u64,
    total_ref_words: u64,
    pairs: Vec<Pair>,
}

fn fixture() -> Fixture {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../tests/fixtures/score/rapidfuzz_wer.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

#[test]
fn fixture_covers_empty_sides() {
    let fixture = fixture();
    assert!(fixture.pairs.len() >= 200);
    assert!(fixture
        .pairs
        .iter()
        .any(|p| p.hyp_tokens.is_empty() && !p.ref_tokens.is_empty()));
    assert!(fixture
        .pairs
        .iter()
        .any(|p| p.ref_tokens.is_empty() && !p.hyp_tokens.is_empty()));
}

#[test]
fn token_rules_agree_with_python_unicodedata() {
    let rules = TokenRules::default();
    for pair in fixture().pairs {
        // Python unicodedata NFC, str.lower and general category P* (score_reference.py).
        assert_eq!(
            tokenize(&pair.reference, &rules),
            pair.ref_tokens,
            "{}",
            pair.id
        );
        assert_eq!(
            tokenize(&pair.hypothesis, &rules),
            pair.hyp_tokens,
            "{}",
            pair.id
        );
    }
}

#[test]
fn word_edit_distance_equals_rapidfuzz() {
    let empty = VariantMap::new();
    for pair in fixture().pairs {
        let alignment = align(&pair.ref_tokens, &pair.hyp_tokens, &empty);
        let counts = alignment.counts();
        // rapidfuzz.distance.Levenshtein.distance over token lists (score_reference.py).
        assert_eq!(counts.errors(), pair.distance, "{}", pair.id);
        assert_eq!(
            counts.ref_words,
            pair.ref_tokens.len() as u64,
            "{}",
            pair.id
        );
        assert_eq!(
            counts.hyp_words(),
            pair.hyp_tokens.len() as u64,
            "{}",
            pair.id
        );
    }
}

#[test]
fn corpus_wer_equals_rapidfuzz_total() {
    let fixture = fixture();
    let reference = Reference {
        path: PathBuf::from("rapidfuzz_wer.json"),
        column: "ref".into(),
        group_columns: Vec::new(),
        utterances: fixture
            .pairs
            .iter()
            .enumerate()
            .map(|(line, p)| ReferenceUtterance {
                id: p.id.clone(),
                line,
                text: p.reference.clone(),
                groups: Vec::new(),
            })
            .collect(),
    };
    let hypotheses = Hypotheses {
        path: PathBuf::from("rapidfuzz_wer.json"),
        entries: fixture
            .pairs
            .iter()
            .enumerate()
            .map(|(line, p)| Hypothesis {
                id: p.id.clone(),
                line,
                text: p.hypothesis.clone(),
            })
            .collect(),
    };
    let options = ScoreOptions::default();
    let scored = score_system(&reference, &hypotheses, None, &options.rules).unwrap();
    let summary = report(&reference, &scored, None, None, &options).overall;
    // Sum of rapidfuzz distances over the sum of reference tokens (score_reference.py).
    assert_eq!(summary.plain.errors(), fixture.total_distance);
    assert_eq!(summary.ref_words, fixture.total_ref_words);
    let expected = fixture.total_distance as f64 / fixture.total_ref_words as f64;
    assert!((summary.wer.unwrap() - expected).abs() < 1e-12);
}

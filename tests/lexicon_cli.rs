//! End-to-end checks of `isogloss lexicon …` on the demo corpus and on bad input.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn isogloss(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the binary runs")
}

fn path(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The dialectal words of a demo manifest, split on white space (the demo transcripts are
/// lower case without punctuation, so this is an independent tokenization for them).
fn dialectal_words(manifest: &str) -> Vec<String> {
    let text =
        std::fs::read_to_string(root().join(format!("tests/data/demo/{manifest}.tsv"))).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let column = header.iter().position(|h| *h == "dialectal").unwrap();
    lines
        .flat_map(|line| {
            line.split('\t')
                .nth(column)
                .unwrap()
                .split_whitespace()
                .map(str::to_string)
                .collect::<Vec<_>>()
        })
        .collect()
}

#[test]
fn coverage_of_the_demo_test_split_by_a_training_lexicon_equals_an_independent_count() {
    let dir = tempfile::tempdir().unwrap();
    let words = dir.path().join("train-words.txt");
    let train_words = dialectal_words("train");
    std::fs::write(&words, train_words.join("\n")).unwrap();
    let lexicon = dir.path().join("train.tsv");
    let rules = root().join("configs/rules-demo-dialectal.toml");
    let output = isogloss(&[
        "lexicon",
        "rules",
        "--words",
        path(&words),
        "--rules",
        path(&rules),
        "--out",
        path(&lexicon),
    ]);
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );

    let manifest = root().join("tests/data/demo/test.tsv");
    let output = isogloss(&[
        "lexicon",
        "coverage",
        "--lexicon",
        path(&lexicon),
        "--manifest",
        path(&manifest),
        "--column",
        "dialectal",
        "--json",
    ]);
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();

    // Independent count: a set of training words against the test tokens.
    let known: HashSet<String> = train_words.into_iter().collect();
    let test_words = dialectal_words("test");
    let mut oov: HashMap<&str, u64> = HashMap::new();
    for word in &test_words {
        if !known.contains(word) {
            *oov.entry(word).or_default() += 1;
        }
    }
    let types: HashSet<&String> = test_words.iter().collect();
    let covered_tokens = test_words.len() as u64 - oov.values().sum::<u64>();
    assert_eq!(report["tokens"], test_words.len() as u64);
    assert_eq!(report["covered_tokens"], covered_tokens);
    assert_eq!(report["types"], types.len() as u64);
    assert_eq!(report["covered_types"], (types.len() - oov.len()) as u64);
    let listed: HashMap<&str, u64> = report["oov"]
        .as_array()
        .unwrap()
        .iter()
        .map(|o| (o["word"].as_str().unwrap(), o["count"].as_u64().unwrap()))
        .collect();
    assert_eq!(listed, oov);
    let rate = report["token_coverage"].as_f64().unwrap();
    assert!((rate - covered_tokens as f64 / test_words.len() as f64).abs() < 1e-12);
    // Held-out words exist in the demo (its README says so), so coverage is below 100%.
    assert!(!oov.is_empty());

    let text = isogloss(&[
        "lexicon",
        "coverage",
        "--lexicon",
        path(&lexicon),
        "--manifest",
        path(&manifest),
        "--column",
        "dialectal",
    ]);
    let text = String::from_utf8_lossy(&text.stdout);
    assert!(text.contains("around 80% on held-out"), "{text}");
}

#[test]
fn rule_file_syntax_error_names_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let rules = dir.path().join("broken.toml");
    std::fs::write(
        &rules,
        "[[rule]]\ngraphemes = \"a\"\nphonemes = \"AE\"\n\n[[rule]]\ngraphemes = b\n",
    )
    .unwrap();
    let words = dir.path().join("words.txt");
    std::fs::write(&words, "ab\n").unwrap();
    let out = dir.path().join("out.tsv");
    let output = isogloss(&[
        "lexicon",
        "rules",
        "--words",
        path(&words),
        "--rules",
        path(&rules),
        "--out",
        path(&out),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.contains("broken.toml, line 6"), "{stderr}");
}

#[test]
fn unknown_graphemes_and_letterless_words_are_listed_and_the_rest_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let rules = dir.path().join("rules.toml");
    std::fs::write(&rules, "[[rule]]\ngraphemes = \"a\"\nphonemes = \"AE\"\n[[rule]]\ngraphemes = \"b\"\nphonemes = \"B\"\n").unwrap();
    let words = dir.path().join("words.txt");
    std::fs::write(&words, "ab\nabc\n'\nba\n").unwrap();
    let out = dir.path().join("out.tsv");
    let output = isogloss(&[
        "lexicon",
        "rules",
        "--words",
        path(&words),
        "--rules",
        path(&rules),
        "--out",
        path(&out),
    ]);
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("abc: no rule covers `c` at letter 3"),
        "{stderr}"
    );
    assert!(
        stderr.contains("': expected at least one letter"),
        "{stderr}"
    );
    assert_eq!(
        std::fs::read_to_string(&out).unwrap(),
        "ab\tAE B\nba\tB AE\n"
    );
}

#[test]
fn g2p_train_apply_and_bad_dictionaries() {
    let dir = tempfile::tempdir().unwrap();
    let empty = dir.path().join("empty.tsv");
    std::fs::write(&empty, "\n").unwrap();
    let model = dir.path().join("model.g2p");
    let output = isogloss(&[
        "lexicon",
        "train-g2p",
        "--lexicon",
        path(&empty),
        "--out",
        path(&model),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("empty.tsv: expected at least one"),
        "{stderr}"
    );

    let dict = root().join("tests/fixtures/lexicon/cmudict-subset.tsv");
    let output = isogloss(&[
        "lexicon",
        "train-g2p",
        "--lexicon",
        path(&dict),
        "--out",
        path(&model),
        "--order",
        "3",
    ]);
    assert!(
        output.status.success(),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let words = dir.path().join("words.txt");
    std::fs::write(&words, "mother\n'\nwater\n").unwrap();
    let out = dir.path().join("out.tsv");
    let scores = dir.path().join("scores.tsv");
    let output = isogloss(&[
        "lexicon",
        "apply-g2p",
        "--model",
        path(&model),
        "--words",
        path(&words),
        "--out",
        path(&out),
        "--nbest",
        "2",
        "--scores",
        path(&scores),
    ]);
    assert_eq!(
        output.status.code(),
        Some(2),
        "the letterless word fails, the rest is done"
    );
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("': expected at least one letter"),
        "{stderr}"
    );
    let lexicon = std::fs::read_to_string(&out).unwrap();
    assert_eq!(
        lexicon
            .lines()
            .filter(|l| l.starts_with("mother\t"))
            .count(),
        2
    );
    assert_eq!(
        lexicon.lines().filter(|l| l.starts_with("water\t")).count(),
        2
    );
    let scores = std::fs::read_to_string(&scores).unwrap();
    assert!(scores.starts_with("word\trank\tlog10_probability\tunits\n"));
}

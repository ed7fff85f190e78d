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

/// `isogloss lexicon COMMAND --option value …`.
fn lexicon_command(command: &str, options: &[(&str, &str)]) -> Output {
    let mut args = vec!["lexicon", command];
    for (option, value) in options {
        args.extend([*option, *value]);
    }
    isogloss(&args)
}

fn stderr_of(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

fn assert_succeeded(output: &Output) {
    assert!(output.status.success(), "{}", stderr_of(output));
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
    let output = lexicon_command(
        "rules",
        &[
            ("--words", path(&words)),
            ("--rules", path(&rules)),
            ("--out", path(&lexicon)),
        ],
    );
    assert_succeeded(&output);

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
    assert_succeeded(&output);
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

    let text = lexicon_command(
        "coverage",
        &[
            ("--lexicon", path(&lexicon)),
            ("--manifest", path(&manifest)),
            ("--column", "dialectal"),
        ],
    );
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
    let output = lexicon_command(
        "rules",
        &[
            ("--words", path(&words)),
            ("--rules", path(&rules)),
            ("--out", path(&out)),
        ],
    );
    assert_eq!(output.status.code(), Some(1));
    let stderr = stderr_of(&output);
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
    let output = lexicon_command(
        "rules",
        &[
            ("--words", path(&words)),
            ("--rules", path(&rules)),
            ("--out", path(&out)),
        ],
    );
    assert_eq!(output.status.code(), Some(2));
    let stderr = stderr_of(&output);
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
    let output = lexicon_command(
        "train-g2p",
        &[("--lexicon", path(&empty)), ("--out", path(&model))],
    );
    assert_eq!(output.status.code(), Some(1));
    let stderr = stderr_of(&output);
    assert!(
        stderr.contains("empty.tsv: expected at least one"),
        "{stderr}"
    );

    let dict = root().join("tests/fixtures/lexicon/cmudict-subset.tsv");
    let output = lexicon_command(
        "train-g2p",
        &[
            ("--lexicon", path(&dict)),
            ("--out", path(&model)),
            ("--order", "3"),
        ],
    );
    assert_succeeded(&output);
    let words = dir.path().join("words.txt");
    std::fs::write(&words, "mother\n'\nwater\n").unwrap();
    let out = dir.path().join("out.tsv");
    let scores = dir.path().join("scores.tsv");
    let output = lexicon_command(
        "apply-g2p",
        &[
            ("--model", path(&model)),
            ("--words", path(&words)),
            ("--out", path(&out)),
            ("--nbest", "2"),
            ("--scores", path(&scores)),
        ],
    );
    assert_eq!(
        output.status.code(),
        Some(2),
        "the letterless word fails, the rest is done"
    );
    let stderr = stderr_of(&output);
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
    // "mother" and "water" are not in the training dictionary. The CMU Pronouncing Dictionary
    // (cmudict 0.7b, stress removed) has M AH DH ER and W AO T ER; one of the two best
    // pronunciations must be at most one phone substitution, deletion or insertion away
    // (measured: water exactly, mother M AA DH ER).
    for (word, cmu) in [("mother", "M AH DH ER"), ("water", "W AO T ER")] {
        let cmu: Vec<&str> = cmu.split(' ').collect();
        let closest = lexicon
            .lines()
            .filter_map(|l| l.strip_prefix(&format!("{word}\t")))
            .map(|units| phone_distance(&units.split(' ').collect::<Vec<_>>(), &cmu))
            .min();
        assert!(
            closest.is_some_and(|d| d <= 1),
            "{word}: {closest:?}\n{lexicon}"
        );
    }
}

/// Levenshtein distance between two phone sequences (unit costs).
fn phone_distance(a: &[&str], b: &[&str]) -> usize {
    let mut row: Vec<usize> = (0..=b.len()).collect();
    for (i, x) in a.iter().enumerate() {
        let mut diagonal = row[0];
        row[0] = i + 1;
        for (j, y) in b.iter().enumerate() {
            let next = (diagonal + usize::from(x != y))
                .min(row[j] + 1)
                .min(row[j + 1] + 1);
            diagonal = row[j + 1];
            row[j + 1] = next;
        }
    }
    row[b.len()]
}

/// `apply-g2p` on words of its own training dictionary: the lexicon and the scores file agree
/// row for row, ranks run 1, 2 with falling probabilities, and the best pronunciation is the
/// dictionary's (the CMU Pronouncing Dictionary, `scripts/reference/cmudict_subset.py`) for
/// nearly every word.
#[test]
fn apply_g2p_gives_the_dictionary_pronunciations_of_training_words() {
    let dir = tempfile::tempdir().unwrap();
    let dict = root().join("tests/fixtures/lexicon/cmudict-subset.tsv");
    let model = dir.path().join("model.g2p");
    let output = lexicon_command(
        "train-g2p",
        &[("--lexicon", path(&dict)), ("--out", path(&model))],
    );
    assert_succeeded(&output);
    // Every 40th word with a single pronunciation in the dictionary.
    let text = std::fs::read_to_string(&dict).unwrap();
    let mut pronunciations: std::collections::BTreeMap<&str, Vec<&str>> = Default::default();
    for line in text.lines() {
        let (word, units) = line.split_once('\t').unwrap();
        pronunciations.entry(word).or_default().push(units);
    }
    let chosen: Vec<(&str, &str)> = pronunciations
        .iter()
        .filter(|(_, p)| p.len() == 1)
        .step_by(40)
        .map(|(w, p)| (*w, p[0]))
        .collect();
    let words = dir.path().join("words.txt");
    let list: Vec<&str> = chosen.iter().map(|(w, _)| *w).collect();
    std::fs::write(&words, list.join("\n")).unwrap();
    let (out, scores) = (dir.path().join("out.tsv"), dir.path().join("scores.tsv"));
    let output = lexicon_command(
        "apply-g2p",
        &[
            ("--model", path(&model)),
            ("--words", path(&words)),
            ("--out", path(&out)),
            ("--nbest", "2"),
            ("--scores", path(&scores)),
        ],
    );
    assert_succeeded(&output);
    let lexicon: Vec<(String, String)> = std::fs::read_to_string(&out)
        .unwrap()
        .lines()
        .map(|l| {
            let (w, u) = l.split_once('\t').unwrap();
            (w.to_string(), u.to_string())
        })
        .collect();
    let scores = std::fs::read_to_string(&scores).unwrap();
    let rows: Vec<Vec<&str>> = scores
        .lines()
        .skip(1)
        .map(|l| l.split('\t').collect())
        .collect();
    assert_eq!(lexicon.len(), 2 * chosen.len());
    assert_eq!(rows.len(), lexicon.len());
    let mut right = 0;
    for (i, (word, cmu)) in chosen.iter().enumerate() {
        let (first, second) = (&rows[2 * i], &rows[2 * i + 1]);
        assert_eq!(
            (first[0], first[1], second[0], second[1]),
            (*word, "1", *word, "2")
        );
        let (p1, p2): (f64, f64) = (first[2].parse().unwrap(), second[2].parse().unwrap());
        assert!(p1 >= p2 && p1 < 0.0, "{word}: {p1} then {p2}");
        for (row, (w, units)) in [first, second].iter().zip(&lexicon[2 * i..2 * i + 2]) {
            assert_eq!((row[0], row[3]), (w.as_str(), units.as_str()));
        }
        right += usize::from(lexicon[2 * i].1 == *cmu);
    }
    eprintln!(
        "apply-g2p: {right} of {} training words as in the dictionary",
        chosen.len()
    );
    assert!(
        right * 100 >= MIN_TRAINING_WORDS_RIGHT_PERCENT * chosen.len(),
        "{right} of {}",
        chosen.len()
    );
}

/// Share of training words whose best pronunciation is the dictionary's: measured 69 of 70
/// (98.6 %), less a margin.
const MIN_TRAINING_WORDS_RIGHT_PERCENT: usize = 90;

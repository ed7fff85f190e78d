//! End-to-end tests of `isogloss score` and `isogloss variants` on small committed fixtures
//! (invented dialect sentences in `tests/fixtures/score/`). The expected counts are worked out
//! by hand in the comments; the aligner itself is checked against rapidfuzz in
//! `crates/score/tests/rapidfuzz_reference.rs`.

use std::path::PathBuf;
use std::process::{Command, Output};

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/score")
        .join(name)
}

fn isogloss(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the isogloss binary runs")
}

fn score(extra: &[&str]) -> Output {
    let reference = fixture("ref.tsv");
    let hypotheses = fixture("hyp_a.tsv");
    let mut args = vec![
        "score",
        "--ref",
        reference.to_str().unwrap(),
        "--column",
        "dialectal",
        "--hyp",
        hypotheses.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    isogloss(&args)
}

fn json_of(output: &Output) -> serde_json::Value {
    assert_eq!(
        output.status.code(),
        Some(0),
        "stderr: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    serde_json::from_slice(&output.stdout).expect("stdout is one JSON object")
}

fn close(value: &serde_json::Value, expected: f64) -> bool {
    value.as_f64().is_some_and(|v| (v - expected).abs() < 1e-9)
}

#[test]
fn json_carries_rates_counts_groups_and_intervals() {
    let variants = fixture("variants.tsv");
    let output = score(&[
        "--variants",
        variants.to_str().unwrap(),
        "--by",
        "dialect,speaker",
        "--json",
    ]);
    let report = json_of(&output);
    // Hand count over 27 reference words: u01 mir→mer, gsi→gsy (2 S, both variants);
    // u02 `im` deleted; u03 schneits→schneit, bärg→bärgä (variant); u04 gsy→gsi (variant) and
    // an inserted `go`; u05 has no hypothesis (4 D); u06 chunnsch→chunsch.
    assert_eq!(report["ref_words"], 27);
    assert!(close(&report["wer"], 12.0 / 27.0), "{}", report["wer"]);
    assert!(
        close(&report["flexible_wer"], 8.0 / 27.0),
        "{}",
        report["flexible_wer"]
    );
    let plain = &report["plain"];
    assert_eq!(
        (
            &plain["substitutions"],
            &plain["deletions"],
            &plain["insertions"]
        ),
        (&6.into(), &5.into(), &1.into())
    );
    assert_eq!(report["flexible"]["forgiven"], 4);
    assert_eq!(report["missing_utterances"], serde_json::json!(["u05"]));
    for name in ["wer_interval", "flexible_wer_interval"] {
        let (low, high) = (&report[name]["low"], &report[name]["high"]);
        let point = if name == "wer_interval" { 12.0 } else { 8.0 } / 27.0;
        assert!(low.as_f64().unwrap() <= point && point <= high.as_f64().unwrap());
    }
    let groups = report["groups"].as_array().unwrap();
    // nord: u01–u03, 14 words, plain errors 2 + 1 + 2; süd: 13 words, 2 + 4 + 1.
    assert_eq!(groups[0]["column"], "dialect");
    assert_eq!(groups[0]["value"], "nord");
    assert_eq!(groups[0]["ref_words"], 14);
    assert!(close(&groups[0]["wer"], 5.0 / 14.0));
    assert!(close(&groups[1]["flexible_wer"], 6.0 / 13.0));
    assert_eq!(groups.len(), 2 + 3, "two dialects, three speakers");
    let confusions = report["confusions"].as_array().unwrap();
    assert_eq!(confusions.len(), 6);
    assert_eq!(confusions[0]["reference"], "bärg");
    assert_eq!(confusions[0]["variant"], true);
    assert_eq!(confusions[1]["reference"], "chunnsch");
    assert_eq!(confusions[1]["variant"], false);
    assert!(String::from_utf8_lossy(&output.stderr).contains("u05"));
}

#[test]
fn same_seed_same_report_other_seed_other_intervals() {
    let first = json_of(&score(&["--json", "--seed", "7"]));
    let again = json_of(&score(&["--json", "--seed", "7"]));
    let other = json_of(&score(&["--json", "--seed", "8"]));
    assert_eq!(first, again);
    assert_ne!(first["wer_interval"], other["wer_interval"]);
    assert_eq!(first["wer"], other["wer"]);
    assert!(
        first.get("flexible_wer").is_none(),
        "no --variants, no flexible WER"
    );
}

#[test]
fn compare_reports_a_paired_difference() {
    let second = fixture("hyp_b.tsv");
    let report = json_of(&score(&["--compare", second.to_str().unwrap(), "--json"]));
    let comparison = &report["comparison"];
    // System 2 errs once (schneits→schneit): 1/27 against 12/27.
    assert!(close(&comparison["wer"], 1.0 / 27.0));
    let difference = &comparison["wer_difference"];
    assert!(close(&difference["difference"], -11.0 / 27.0));
    assert!(difference["probability_system2_better"].as_f64().unwrap() > 0.9);
    assert!(difference["difference_interval"]["high"].as_f64().unwrap() < 0.0);
}

#[test]
fn markdown_by_default_and_csv_on_request() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("rates.csv");
    let variants = fixture("variants.tsv");
    let output = score(&[
        "--variants",
        variants.to_str().unwrap(),
        "--by",
        "dialect",
        "--csv",
        csv.to_str().unwrap(),
    ]);
    assert_eq!(output.status.code(), Some(0));
    let markdown = String::from_utf8(output.stdout).unwrap();
    for expected in [
        "# Word error rates",
        "## Overall",
        "| WER | 44.44 % |",
        "| flexible WER | 29.63 % |",
        "## By dialect",
        "## Most frequent confusions",
        "1 without a hypothesis",
    ] {
        assert!(
            markdown.contains(expected),
            "`{expected}` missing in:\n{markdown}"
        );
    }
    let csv = std::fs::read_to_string(csv).unwrap();
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines.len(), 1 + 1 + 2, "header, overall, two dialects");
    assert!(
        lines[1].starts_with("overall,,6,27,6,5,1,0.444444,"),
        "{}",
        lines[1]
    );
    assert!(lines[2].starts_with("dialect,nord,3,14,"), "{}", lines[2]);
}

fn assert_fails(output: &Output, expected: &[&str]) {
    assert_eq!(output.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&output.stderr);
    for text in expected {
        assert!(stderr.contains(text), "`{text}` missing in: {stderr}");
    }
    assert!(!stderr.contains("panicked"), "{stderr}");
}

#[test]
fn bad_input_exits_1_with_a_clear_message() {
    let unknown = fixture("hyp_unknown.tsv");
    let output = score(&["--compare", unknown.to_str().unwrap()]);
    assert_fails(&output, &["hyp_unknown.tsv", "line 3", "`u99`", "ref.tsv"]);

    let duplicate = fixture("hyp_duplicate.tsv");
    let output = score(&["--compare", duplicate.to_str().unwrap()]);
    assert_fails(&output, &["hyp_duplicate.tsv", "line 4", "`u01`", "line 2"]);

    let no_header = fixture("variants_without_header.tsv");
    let output = score(&["--variants", no_header.to_str().unwrap()]);
    assert_fails(
        &output,
        &[
            "variants_without_header.tsv",
            "line 1",
            "variant<TAB>normalized",
        ],
    );

    let output = score(&["--by", "region"]);
    assert_fails(&output, &["ref.tsv", "`region`"]);

    let reference = fixture("ref.tsv");
    let hypotheses = fixture("hyp_a.tsv");
    let output = isogloss(&[
        "score",
        "--ref",
        reference.to_str().unwrap(),
        "--column",
        "phonetic",
        "--hyp",
        hypotheses.to_str().unwrap(),
    ]);
    assert_fails(&output, &["ref.tsv", "`phonetic`", "dialectal, normalized"]);

    let output = score(&["--variants", "/nonexistent/variants.tsv"]);
    assert_fails(&output, &["/nonexistent/variants.tsv"]);
}

#[test]
fn variants_pairs_word_aligned_rows_and_lists_the_rest() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("variants.tsv");
    let manifest = fixture("ref.tsv");
    let output = isogloss(&[
        "variants",
        "--manifest",
        manifest.to_str().unwrap(),
        "--from",
        "dialectal",
        "--to",
        "normalized",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(output.status.code(), Some(0));
    let stderr = String::from_utf8_lossy(&output.stderr);
    // u03 has 5 dialectal words but 6 normalized ones (line 4 of the manifest).
    assert!(
        stderr.contains("line 4") && stderr.contains("`u03`"),
        "{stderr}"
    );
    let written = std::fs::read_to_string(&out).unwrap();
    let lines: Vec<&str> = written.lines().collect();
    assert_eq!(lines[0], "variant\tnormalized");
    for pair in [
        "gsi\tgewesen",
        "gsy\tgewesen",
        "mer\twir",
        "mir\twir",
        "chue\tkuh",
    ] {
        assert!(lines.contains(&pair), "`{pair}` missing in:\n{written}");
    }
    assert!(
        !written.contains("schneits"),
        "the skipped row must not contribute"
    );

    // The written map is usable by `score`.
    let output = score(&["--variants", out.to_str().unwrap(), "--json"]);
    let report = json_of(&output);
    assert!(report["flexible_wer"].as_f64().unwrap() < report["wer"].as_f64().unwrap());
}

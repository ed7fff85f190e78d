//! End-to-end tests of `isogloss score` and `isogloss variants` on small committed fixtures
//! (eye-dialect sentences of the project's invented Wendle Valley scenario, regions `fells` and
//! `marsh`, in `tests/fixtures/score/`). The expected counts are worked out
//! by hand in the comments; the aligner itself is checked against rapidfuzz in
//! `crates/score/tests/rapidfuzz_reference.rs`.

use std::path::PathBuf;
use std::process::{Command, Output};

#[path = "../crates/chart/tests/support/geometry.rs"]
mod geometry;

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
    // Hand count over 27 reference words (4 + 5 + 5 + 5 + 4 + 4): u01 hoose→hoos, auld→owd
    // (2 S, both variants in variants.tsv); u02 `the` deleted; u03 wisnae→wis (not a variant:
    // `wisnae` is not in the map), cauld→cowd (variant); u04 an inserted second `us` and
    // owd→auld (variant); u05 has no hypothesis (4 D); u06 tha’s→thas (not a variant; the
    // typographic apostrophe keeps `tha’s` one word). S 6, D 5, I 1: 12 errors; 4 forgiven: 8.
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
    // fells: u01–u03, 14 words, plain errors 2 + 1 + 2; marsh: u04–u06, 13 words, plain errors
    // 2 + 4 + 1, flexible 1 + 4 + 1 (u04 owd→auld forgiven).
    assert_eq!(groups[0]["column"], "dialect");
    assert_eq!(groups[0]["value"], "fells");
    assert_eq!(groups[0]["ref_words"], 14);
    assert!(close(&groups[0]["wer"], 5.0 / 14.0));
    assert!(close(&groups[1]["flexible_wer"], 6.0 / 13.0));
    assert_eq!(groups.len(), 2 + 3, "two dialects, three speakers");
    assert_eq!(groups[4]["column"], "speaker");
    assert_eq!(groups[4]["value"], "zoë");
    assert_eq!(groups[4]["ref_words"], 13);
    // Every substitution occurs once, so the list is in alphabetical order of the pair.
    let confusions: Vec<(&str, &str, bool)> = report["confusions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["reference"].as_str().unwrap(),
                c["hypothesis"].as_str().unwrap(),
                c["variant"].as_bool().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        confusions,
        [
            ("auld", "owd", true),
            ("cauld", "cowd", true),
            ("hoose", "hoos", true),
            ("owd", "auld", true),
            ("tha’s", "thas", false),
            ("wisnae", "wis", false),
        ]
    );
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
    // System 2 errs once (wisnae→wis): 1/27 against 12/27. Its u05 writes `fête` decomposed
    // (e + U+0302), which NFC makes equal to the reference's precomposed `fête`.
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
    assert!(lines[2].starts_with("dialect,fells,3,14,"), "{}", lines[2]);
}

#[test]
fn chart_shows_every_rate_with_its_interval_per_dialect_and_speaker() {
    let dir = tempfile::tempdir().unwrap();
    let chart = dir.path().join("chart.svg");
    let variants = fixture("variants.tsv");
    let second = fixture("hyp_b.tsv");
    let report = json_of(&score(&[
        "--variants",
        variants.to_str().unwrap(),
        "--by",
        "dialect,speaker",
        "--compare",
        second.to_str().unwrap(),
        "--confidence",
        "0.9",
        "--json",
        "--chart",
        chart.to_str().unwrap(),
    ]));
    let svg = std::fs::read_to_string(&chart).unwrap();
    // The configured level, not a fixed one.
    assert!(
        svg.contains(">90 % bootstrap interval over utterances</text>"),
        "{svg}"
    );
    assert!(!svg.contains("95 %"));
    for heading in ["Overall", "By dialect: hyp_a.tsv", "By speaker: hyp_a.tsv"] {
        assert!(svg.contains(&format!(">{heading}</text>")), "{heading}");
    }
    // Rows top to bottom: both systems overall, then the groups in report order.
    let mut expected = vec![
        ("all: hyp_a.tsv".to_string(), &report, None),
        (
            "all: hyp_b.tsv".to_string(),
            &report["comparison"],
            Some(&report["comparison"]),
        ),
    ];
    for group in report["groups"].as_array().unwrap() {
        expected.push((group["value"].as_str().unwrap().to_string(), group, None));
    }
    let rows = geometry::bar_rows(&svg);
    assert_eq!(rows.len(), expected.len(), "{rows:?}");
    for (row, (label, summary, comparison)) in rows.iter().zip(&expected) {
        assert_eq!(&row.label, label);
        assert_eq!(row.bars.len(), 2, "{label}");
        let figures = [
            ("wer", "wer_interval", "wer_difference"),
            (
                "flexible_wer",
                "flexible_wer_interval",
                "flexible_wer_difference",
            ),
        ];
        for (bar, (rate, interval, difference)) in row.bars.iter().zip(figures) {
            let percent = |v: &serde_json::Value| 100.0 * v.as_f64().unwrap();
            let (low, high) = bar.interval.expect("every bar has its whisker");
            for (drawn, figure) in [
                (bar.value, percent(&summary[rate])),
                (low, percent(&summary[interval]["low"])),
                (high, percent(&summary[interval]["high"])),
            ] {
                assert!(
                    (drawn - figure).abs() < 0.01,
                    "{label} {rate}: drawn {drawn}, report {figure}"
                );
            }
            let mark = comparison.and_then(|c| {
                let d = &c[difference]["difference_interval"];
                let (low, high) = (d["low"].as_f64()?, d["high"].as_f64()?);
                (high < 0.0)
                    .then(|| "lower".to_string())
                    .or((low > 0.0).then(|| "higher".to_string()))
            });
            assert_eq!(bar.mark, mark, "{label} {rate}");
        }
    }
    // System 2 errs far less (1/27 against 12/27): its plain WER is marked lower.
    assert_eq!(rows[1].bars[0].mark.as_deref(), Some("lower"));
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
    // u03 has 5 dialectal words but 6 normalized ones (`wisnae` = `was not`; line 4 of the
    // manifest).
    assert!(
        stderr.contains("line 4") && stderr.contains("`u03`"),
        "{stderr}"
    );
    let written = std::fs::read_to_string(&out).unwrap();
    let lines: Vec<&str> = written.lines().collect();
    assert_eq!(lines[0], "variant\tnormalized");
    for pair in [
        "auld\told",
        "owd\told",
        "wis\twas",
        "were\twas",
        "faither\tfather",
        "tha’s\tyou're",
    ] {
        assert!(lines.contains(&pair), "`{pair}` missing in:\n{written}");
    }
    assert!(
        !written.contains("wisnae"),
        "the skipped row must not contribute"
    );

    // The written map is usable by `score`.
    let output = score(&["--variants", out.to_str().unwrap(), "--json"]);
    let report = json_of(&output);
    assert!(report["flexible_wer"].as_f64().unwrap() < report["wer"].as_f64().unwrap());
}

/// `--speakers` joins a speaker table on the reference's `speaker` column: an age group of one
/// speaker has that speaker's figures, a group of two the sum of their words (the fixture:
/// martha and zoë 80+, tom 60-79).
#[test]
fn a_speaker_table_gives_breakdowns_by_its_columns() {
    let speakers = fixture("speakers.tsv");
    let report = json_of(&score(&[
        "--speakers",
        speakers.to_str().unwrap(),
        "--by",
        "age,speaker",
        "--json",
    ]));
    let groups = report["groups"].as_array().unwrap();
    let find = |column: &str, value: &str| {
        groups
            .iter()
            .find(|g| g["column"] == column && g["value"] == value)
            .unwrap_or_else(|| panic!("no group {column} = {value} in {groups:?}"))
    };
    let (young, old) = (find("age", "60-79"), find("age", "80+"));
    let (tom, martha, zoe) = (
        find("speaker", "tom"),
        find("speaker", "martha"),
        find("speaker", "zoë"),
    );
    assert_eq!(young["ref_words"], tom["ref_words"]);
    assert_eq!(young["wer"], tom["wer"]);
    assert_eq!(
        old["ref_words"].as_u64().unwrap(),
        martha["ref_words"].as_u64().unwrap() + zoe["ref_words"].as_u64().unwrap()
    );

    assert_fails(
        &score(&["--speakers", speakers.to_str().unwrap(), "--by", "region"]),
        &["`region`", "speakers.tsv", "ref.tsv"],
    );
}

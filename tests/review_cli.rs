//! `isogloss calibrate`, `shortlist` and `review` end to end: on the demo (shipped model, dev
//! and test splits) the calibrated confidence reaches the calibration goal and the shortlist
//! picks segments the recognizer gets more wrong than average; bad input (JSON that is not an
//! isogloss transcript, times beyond the audio) is refused with the file and place named, and a
//! batch carries on past it.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn text(path: &Path) -> String {
    path.to_str().expect("test paths are UTF-8").to_string()
}

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the isogloss binary runs")
}

fn ok(args: &[&str]) -> Output {
    let output = run(args);
    assert!(
        output.status.success(),
        "isogloss {args:?} failed: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    output
}

fn transcribe(split: &str, out: &Path) {
    ok(&[
        "transcribe",
        "--model",
        &text(&repo("models/demo")),
        "--lm",
        &text(&repo("models/demo-lm/indomain-3gram.arpa")),
        "--lexicon",
        &text(&repo("models/demo-lm/lexicon-grapheme.tsv")),
        "--manifest",
        &text(&repo(&format!("tests/data/demo/{split}.tsv"))),
        "--format",
        "json",
        "--out",
        &text(out),
    ]);
}

/// The number after `label` in `output`.
fn figure(output: &str, label: &str) -> f64 {
    let rest = &output[output
        .find(label)
        .unwrap_or_else(|| panic!("{label} in {output}"))
        + label.len()..];
    let number: String = rest
        .trim_start()
        .chars()
        .take_while(|c| c.is_ascii_digit() || *c == '.' || *c == '-')
        .collect();
    number
        .parse()
        .unwrap_or_else(|_| panic!("a number after {label} in {output}"))
}

#[test]
fn on_the_demo_calibration_meets_its_goal_and_the_shortlist_finds_errors() {
    let dir = tempfile::tempdir().unwrap();
    let (dev, test) = (dir.path().join("dev.json"), dir.path().join("test.json"));
    transcribe("dev", &dev);
    transcribe("test", &test);
    let calibration = dir.path().join("calibration");
    let output = ok(&[
        "calibrate",
        "--transcript",
        &text(&dev),
        "--reference",
        &text(&repo("tests/data/demo/dev.tsv")),
        "--column",
        "dialectal",
        "--test-transcript",
        &text(&test),
        "--test-reference",
        &text(&repo("tests/data/demo/test.tsv")),
        "--out",
        &text(&calibration),
        "--json",
    ]);
    let figures: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let test_split = &figures["splits"][1];
    assert_eq!(test_split["split"], "test");
    let (raw, calibrated) = (
        test_split["ece_raw"].as_f64().unwrap(),
        test_split["ece_calibrated"].as_f64().unwrap(),
    );
    // the issue's goal: ECE ≤ 0.05 on the demo test split after calibration fitted on dev
    // (measured 0.037 raw, 0.025 calibrated; 0.126 and 0.037 with the narrow-context model before)
    assert!(
        calibrated <= 0.05 && calibrated < raw,
        "ECE {raw} → {calibrated}"
    );
    assert!(std::fs::read_to_string(calibration.join("reliability.svg"))
        .unwrap()
        .starts_with("<svg"));

    let chosen = dir.path().join("chosen.tsv");
    let output = ok(&[
        "shortlist",
        &text(&test),
        "--manifest",
        &text(&repo("tests/data/demo/test.tsv")),
        "--train",
        &text(&repo("tests/data/demo/train.tsv")),
        "--column",
        "dialectal",
        "--calibration",
        &text(&calibration.join("calibration.toml")),
        "--minutes",
        "1",
        "--out",
        &text(&chosen),
        "--evaluate",
        &text(&repo("tests/data/demo/test.tsv")),
    ]);
    let report = String::from_utf8_lossy(&output.stdout);
    let rho = figure(&report, "with segment WER:");
    let pool = figure(&report, "WER of the whole pool:");
    let picked = figure(&report, "chosen segments:");
    // lower confidence goes with higher WER, and the chosen minute is worse than the pool
    // (measured: ρ = −0.539, 34.3 % against 11.4 %)
    assert!(rho < 0.0, "{report}");
    assert!(picked > pool, "{report}");
    let manifest = std::fs::read_to_string(&chosen).unwrap();
    assert!(
        manifest.starts_with("id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n")
    );
    let ranking = std::fs::read_to_string(dir.path().join("chosen.ranking.tsv")).unwrap();
    let minutes: f64 = ranking
        .lines()
        .last()
        .unwrap()
        .split('\t')
        .nth(3)
        .unwrap()
        .parse()
        .unwrap();
    assert!(minutes <= 1.0 && minutes > 0.9, "{ranking}");
}

#[test]
fn bad_transcripts_are_refused_with_file_and_place() {
    let dir = tempfile::tempdir().unwrap();
    let other = dir.path().join("other.json");
    std::fs::write(&other, "{\"results\": []}").unwrap();
    let output = run(&[
        "review",
        &text(&other),
        "--out",
        &text(&dir.path().join("r")),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains("other.json: not an isogloss transcript")
            && stderr.matches("other.json").count() == 1,
        "{stderr}"
    );

    // one recording fits its audio, the other claims 400 s of a 116 s file
    let interview = repo("tests/data/demo/interviews/interview1.ogg");
    let document = format!(
        r#"{{"format": "isogloss-transcript", "version": 1, "items": [
        {{"id": "good", "audio": "{a}", "stretches": [{{"from_s": 1.0, "to_s": 2.0, "text": "we",
          "tokens": [{{"spelling": "we", "from_s": 1.1, "to_s": 1.4, "certainty": 0.8}}]}}]}},
        {{"id": "late", "audio": "{b}", "stretches": [{{"from_s": 1.0, "to_s": 2.0, "text": "",
          "tokens": []}}, {{"from_s": 399.0, "to_s": 400.0, "text": "we",
          "tokens": [{{"spelling": "we", "from_s": 399.1, "to_s": 399.4, "certainty": 0.8}}]}}]}}]}}"#,
        a = text(&interview),
        b = text(&repo("tests/data/demo/interviews/interview2.ogg")),
    );
    let transcript = dir.path().join("t.json");
    std::fs::write(&transcript, document).unwrap();
    let out = dir.path().join("review");
    let output = run(&["review", &text(&transcript), "--out", &text(&out)]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("interview2.ogg: the transcript's stretch 2 (`late-002`) reaches 400.000 s, but the audio lasts"),
        "{stderr}"
    );
    assert!(out.join("interview1.html").exists() && !out.join("interview2.html").exists());
    let index = std::fs::read_to_string(out.join("index.html")).unwrap();
    assert!(index.contains("no page:") && index.contains("interview1.html"));

    let output = run(&[
        "shortlist",
        &text(&transcript),
        "--minutes",
        "5",
        "--out",
        &text(&dir.path().join("chosen.tsv")),
    ]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("stretch `late-002` reaches 400.000 s"),
        "{stderr}"
    );
    let chosen = std::fs::read_to_string(dir.path().join("chosen.tsv")).unwrap();
    assert_eq!(
        chosen.lines().count(),
        3,
        "header, good and late-001:\n{chosen}"
    );
}

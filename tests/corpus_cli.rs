//! End-to-end checks of `isogloss corpus check` and `isogloss corpus split` on the committed mini
//! corpus (`tests/data/mini`) and the bad-input manifests in `tests/fixtures/corpus`.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn isogloss(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .current_dir(repo())
        .output()
        .expect("the isogloss binary runs")
}

/// stdout and stderr together, for message checks.
fn text(output: &Output) -> String {
    format!(
        "{}{}",
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    )
}

fn json(output: &Output) -> serde_json::Value {
    serde_json::from_slice(&output.stdout).expect("--json prints one JSON object on stdout")
}

#[test]
fn mini_corpus_passes_with_figures_per_dialect() {
    let output = isogloss(&["corpus", "check", "tests/data/mini/manifest.tsv"]);
    let all = text(&output);
    assert_eq!(output.status.code(), Some(0), "{all}");
    assert!(all.contains("4 utterances"), "{all}");
    assert!(all.contains("fells") && all.contains("marsh"), "{all}");
    assert!(all.contains("0 error(s), 0 warning(s)"), "{all}");
}

#[test]
fn json_report_counts_utterances_hours_and_vocabulary() {
    let output = isogloss(&["corpus", "check", "tests/data/mini/manifest.tsv", "--json"]);
    assert_eq!(output.status.code(), Some(0), "{}", text(&output));
    let report = json(&output);
    assert_eq!(report["utterances"], 4);
    assert_eq!(report["errors"], 0);
    assert_eq!(report["speakers"], 2);
    // Two whole files of 1.211625 s and 1.403125 s (lengths as `soxi -D` reports them) plus
    // two segments of 1.39 s and 1.24 s from the manifest.
    let expected_hours = (1.211625 + 1.403125 + 1.39 + 1.24) / 3600.0;
    let hours = report["hours"].as_f64().unwrap();
    assert!((hours - expected_hours).abs() < 1e-9, "{hours}");
    let vocabulary = &report["manifests"][0]["vocabulary"];
    // Distinct whitespace tokens, counted by hand from tests/data/mini/manifest.tsv.
    assert_eq!(vocabulary[0]["column"], "dialectal");
    assert_eq!(vocabulary[0]["tokens"], 25);
    assert_eq!(vocabulary[0]["types"], 22);
    assert_eq!(vocabulary[1]["types"], 22);
}

#[test]
fn missing_column_fails_naming_file_line_and_column() {
    let output = isogloss(&[
        "corpus",
        "check",
        "tests/fixtures/corpus/missing-column.tsv",
    ]);
    let all = text(&output);
    assert_eq!(output.status.code(), Some(1), "{all}");
    assert!(
        all.contains("missing-column.tsv, line 1") && all.contains("missing: speaker"),
        "{all}"
    );
}

#[test]
fn duplicate_ids_fail_naming_both_lines() {
    let output = isogloss(&[
        "corpus",
        "check",
        "tests/fixtures/corpus/duplicate-ids.tsv",
        "--json",
    ]);
    assert_eq!(output.status.code(), Some(1), "{}", text(&output));
    let report = json(&output);
    assert_eq!(report["errors"], 1);
    assert_eq!(report["utterances"], 1);
    let problem = &report["problems"][0];
    assert_eq!(problem["line"], 3);
    let message = problem["message"].as_str().unwrap();
    assert!(
        message.contains("`fells07-001` again (first on line 2)"),
        "{message}"
    );
}

#[test]
fn start_beyond_the_audio_and_start_after_end_are_both_listed() {
    let output = isogloss(&[
        "corpus",
        "check",
        "tests/fixtures/corpus/start-beyond-end.tsv",
    ]);
    let all = text(&output);
    assert_eq!(output.status.code(), Some(1), "{all}");
    assert!(
        all.contains("start-beyond-end.tsv, line 2") && all.contains("found start 9 s"),
        "{all}"
    );
    assert!(
        all.contains("start-beyond-end.tsv, line 3") && all.contains("start 1 s and end 0.5 s"),
        "{all}"
    );
    // The good row is still counted.
    assert!(all.contains("total: 1 utterances"), "{all}");
}

/// Issue 16: audio that cannot be read is a failed item of the check (exit code 2,
/// docs/exit-codes.md), listed with its file and reason; every other row is still checked.
#[test]
fn unreadable_and_missing_audio_are_failed_items_and_the_rest_is_checked() {
    let output = isogloss(&[
        "corpus",
        "check",
        "tests/fixtures/corpus/bad-audio.tsv",
        "--json",
    ]);
    assert_eq!(output.status.code(), Some(2), "{}", text(&output));
    assert!(
        String::from_utf8_lossy(&output.stderr).contains(
            "2 row(s) of tests/fixtures/corpus/bad-audio.tsv have audio that cannot be read"
        ),
        "{}",
        text(&output)
    );
    let report = json(&output);
    assert_eq!(report["errors"], 2);
    assert_eq!(report["audio_errors"], 2);
    assert_eq!(report["warnings"], 1);
    assert_eq!(report["utterances"], 1);
    let messages: Vec<String> = report["problems"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| format!("line {}: {}", p["line"], p["message"].as_str().unwrap()))
        .collect();
    let has = |text: &str| messages.iter().any(|m| m.contains(text));
    assert!(
        has("line 2: `notes-001`") && has("not-audio.wav: not a readable audio file"),
        "{messages:?}"
    );
    assert!(
        has("line 3: `gone-001`") && has("no-such-recording.flac"),
        "{messages:?}"
    );
    assert!(has("line 4: empty `dialectal` transcript"), "{messages:?}");
}

#[test]
fn speakers_shared_between_manifests_are_a_warning() {
    let output = isogloss(&[
        "corpus",
        "check",
        "tests/data/mini/manifest.tsv",
        "tests/fixtures/corpus/shares-a-speaker.tsv",
        "--json",
    ]);
    assert_eq!(output.status.code(), Some(0), "{}", text(&output));
    let report = json(&output);
    assert_eq!(report["shared_speakers"][0]["speakers"][0], "marsh03");
    assert_eq!(report["warnings"], 1);
    assert_eq!(report["utterances"], 5);
}

#[test]
fn missing_manifest_is_an_error_not_a_panic() {
    let output = isogloss(&["corpus", "check", "tests/data/mini/nothing-here.tsv"]);
    let all = text(&output);
    assert_eq!(output.status.code(), Some(1), "{all}");
    assert!(
        all.contains("nothing-here.tsv") && !all.contains("panicked"),
        "{all}"
    );
}

/// A manifest of 8 speakers in each of two dialects, every row reusing the mini corpus audio.
fn larger_manifest(dir: &Path) -> PathBuf {
    let audio = repo().join("tests/data/mini/audio").canonicalize().unwrap();
    let mut text = String::from("id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n");
    for dialect in ["fells", "marsh"] {
        for speaker in 0..8 {
            for (n, file) in ["fells07-001.flac", "fells07-002.flac"].iter().enumerate() {
                text.push_str(&format!(
                    "{dialect}{speaker}-{n}\t{}\t\t\t{dialect}{speaker}\t{dialect}\ta b\ta b\n",
                    audio.join(file).display()
                ));
            }
        }
    }
    let path = dir.join("all.tsv");
    std::fs::write(&path, text).unwrap();
    path
}

#[test]
fn split_is_speaker_disjoint_complete_and_reproducible() {
    let dir = tempfile::tempdir().unwrap();
    let manifest = larger_manifest(dir.path());
    let run = |out: &str, seed: &str| {
        let out = dir.path().join(out);
        let output = isogloss(&[
            "corpus",
            "split",
            manifest.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
            "--dev-share",
            "0.25",
            "--test-share",
            "0.25",
            "--seed",
            seed,
        ]);
        assert_eq!(output.status.code(), Some(0), "{}", text(&output));
        ["train", "dev", "test"]
            .map(|part| std::fs::read_to_string(out.join(format!("{part}.tsv"))).unwrap())
    };
    let first = run("a", "5");
    assert_eq!(first, run("b", "5"));
    assert_ne!(first, run("c", "6"));
    // Checking the three parts together finds no shared speaker and every utterance once.
    let parts: Vec<String> = ["train", "dev", "test"]
        .iter()
        .map(|p| dir.path().join(format!("a/{p}.tsv")).display().to_string())
        .collect();
    let mut args = vec!["corpus", "check", "--json"];
    args.extend(parts.iter().map(String::as_str));
    let output = isogloss(&args);
    assert_eq!(output.status.code(), Some(0), "{}", text(&output));
    let report = json(&output);
    assert_eq!(report["utterances"], 32);
    assert_eq!(report["shared_speakers"].as_array().unwrap().len(), 0);
    for (index, part) in ["train", "dev", "test"].iter().enumerate() {
        let dialects = report["manifests"][index]["dialects"].as_array().unwrap();
        // Stratified: with 8 equal speakers per dialect, each part holds both dialects.
        assert_eq!(dialects.len(), 2, "{part}: {dialects:?}");
    }
}

#[test]
fn impossible_shares_are_a_usage_error() {
    let dir = tempfile::tempdir().unwrap();
    let output = isogloss(&[
        "corpus",
        "split",
        "tests/data/mini/manifest.tsv",
        "--out",
        dir.path().to_str().unwrap(),
        "--dev-share",
        "0.7",
        "--test-share",
        "0.5",
    ]);
    let all = text(&output);
    assert_eq!(output.status.code(), Some(1), "{all}");
    assert!(all.contains("split shares"), "{all}");
}

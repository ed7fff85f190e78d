//! End-to-end transcription with the shipped demo model on the demo test split: decoding with an
//! n-gram LM and a lexicon must beat greedy decoding, the flexible WER of the dialectal writing
//! must lie below its plain WER, and a long interview recording comes back as timed words.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use isogloss_lexicon::Lexicon;
use isogloss_lm::ArpaModel;
use isogloss_sweep::resources::lm_words;

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn text(path: &Path) -> String {
    path.to_str().expect("test paths are UTF-8").to_string()
}

fn isogloss(args: &[&str]) -> Output {
    let output = Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the isogloss binary runs");
    assert!(
        output.status.success(),
        "isogloss {args:?} failed: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    output
}

/// (WER, flexible WER) of a hypotheses file against the dialectal column of the test split.
fn score(hypotheses: &Path) -> (f64, f64) {
    let output = isogloss(&[
        "score",
        "--ref",
        &text(&repo("tests/data/demo/test.tsv")),
        "--column",
        "dialectal",
        "--hyp",
        &text(hypotheses),
        "--variants",
        &text(&repo("models/demo-variants.tsv")),
        "--json",
    ]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    (
        json["wer"].as_f64().unwrap(),
        json["flexible_wer"].as_f64().unwrap(),
    )
}

#[test]
fn lm_and_lexicon_decoding_beats_greedy_on_the_test_split() {
    let dir = tempfile::tempdir().unwrap();
    let dir = dir.path();
    let model = repo("models/demo");
    let test = repo("tests/data/demo/test.tsv");
    let arpa = dir.join("dialectal.arpa");
    isogloss(&[
        "lm",
        "build",
        "--sentences",
        &text(&repo("tests/data/demo/train.dialectal.txt")),
        "--order",
        "3",
        "--out",
        &text(&arpa),
    ]);
    let lm = ArpaModel::read(&arpa).unwrap();
    let words = lm_words(&lm);
    let lexicon = dir.join("graphemes.tsv");
    Lexicon::graphemes(words.iter().map(String::as_str), None)
        .write(&lexicon)
        .unwrap();

    let greedy = dir.join("greedy.tsv");
    isogloss(&[
        "transcribe",
        "--model",
        &text(&model),
        "--manifest",
        &text(&test),
        "--greedy",
        "--out",
        &text(&greedy),
    ]);
    let searched = dir.join("lm.tsv");
    isogloss(&[
        "transcribe",
        "--model",
        &text(&model),
        "--manifest",
        &text(&test),
        "--lm",
        &text(&arpa),
        "--lexicon",
        &text(&lexicon),
        "--lm-weight",
        "0.8",
        "--word-bonus",
        "1.5",
        "--out",
        &text(&searched),
    ]);
    let (greedy_wer, _) = score(&greedy);
    let (wer, flexible_wer) = score(&searched);
    assert!(
        wer < greedy_wer,
        "LM + lexicon WER {wer} should be below greedy WER {greedy_wer}"
    );
    assert!(
        flexible_wer < wer,
        "flexible WER {flexible_wer} should be below plain WER {wer}"
    );
}

#[test]
fn a_long_interview_comes_back_as_timed_words_in_order() {
    let dir = tempfile::tempdir().unwrap();
    let interview = std::fs::read_dir(repo("tests/data/demo/interviews"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "ogg"))
        .min()
        .unwrap();
    let out = dir.path().join("interview.json");
    isogloss(&[
        "transcribe",
        "--model",
        &text(&repo("models/demo")),
        "--format",
        "json",
        "--out",
        &text(&out),
        &text(&interview),
    ]);
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    let duration = isogloss_audio::probe(&interview).unwrap().duration_seconds;
    let mut times = Vec::new();
    let mut words = 0;
    collect_times(&json, &mut times, &mut words);
    assert!(
        words > 20,
        "a two-minute interview gives many words, found {words}"
    );
    for pair in times.windows(2) {
        assert!(pair[0] <= pair[1] + 1e-9, "times go backwards: {pair:?}");
    }
    assert!(times.iter().all(|&t| (0.0..=duration + 1e-6).contains(&t)));
}

/// Start and end times of every word, in document order.
fn collect_times(value: &serde_json::Value, times: &mut Vec<f64>, words: &mut usize) {
    match value {
        serde_json::Value::Object(map) => {
            if let (Some(start), Some(end), Some(_)) = (
                map.get("from_s").and_then(|v| v.as_f64()),
                map.get("to_s").and_then(|v| v.as_f64()),
                map.get("spelling")
                    .filter(|_| map.contains_key("certainty")),
            ) {
                times.push(start);
                times.push(end);
                *words += 1;
            } else {
                for v in map.values() {
                    collect_times(v, times, words);
                }
            }
        }
        serde_json::Value::Array(items) => {
            items.iter().for_each(|v| collect_times(v, times, words))
        }
        _ => {}
    }
}

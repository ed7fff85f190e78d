//! End-to-end: `isogloss lm build | eval | mix | prune` through the binary.

use std::path::Path;
use std::process::{Command, Output};

fn isogloss(arguments: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(arguments)
        .output()
        .unwrap()
}

fn text(output: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&output.stdout).into_owned(),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

fn path(folder: &Path, name: &str) -> String {
    folder.join(name).display().to_string()
}

#[test]
fn build_eval_mix_prune() {
    let folder = tempfile::tempdir().unwrap();
    let dir = folder.path();
    std::fs::write(
        dir.join("harbour.txt"),
        "the ferry leaves the north quay at dawn\nthe boats came back full of herring\n\
         my grandmother sold fish at the quay\nthe market was busy at dawn\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("farm.txt"),
        "the cows came back at dusk\nmy grandfather sold milk at the market\nthe barn was full of hay\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("dev.txt"),
        "the boats came back at dusk\nmy grandmother sold milk\n",
    )
    .unwrap();

    for (source, model, smoothing) in [
        ("harbour.txt", "harbour.arpa", "modified-kneser-ney"),
        ("farm.txt", "farm.arpa.gz", "witten-bell"),
    ] {
        let output = isogloss(&[
            "lm",
            "build",
            "--sentences",
            &path(dir, source),
            "--order",
            "3",
            "--smoothing",
            smoothing,
            "--out",
            &path(dir, model),
        ]);
        assert!(output.status.success(), "{:?}", text(&output));
    }

    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--sentences",
        &path(dir, "dev.txt"),
        "--json",
    ]);
    assert!(output.status.success(), "{:?}", text(&output));
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    // 6 + 4 words and two </s> are predicted (docs/language-models.md: every word and </s> counts).
    assert_eq!(report["tokens"], 12);
    // "dusk" and "milk" are not in the harbour text: 2 of 10 words.
    assert!((report["oov_rate"].as_f64().unwrap() - 0.2).abs() < 1e-12);
    assert!(report["perplexity"].as_f64().unwrap() > 1.0);

    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--arpa",
        &path(dir, "farm.arpa.gz"),
        "--sentences",
        &path(dir, "dev.txt"),
    ]);
    let (stdout, _) = text(&output);
    assert!(output.status.success());
    assert!(
        stdout.contains("harbour.arpa") && stdout.contains("farm.arpa.gz"),
        "{stdout}"
    );

    let output = isogloss(&[
        "lm",
        "mix",
        "--arpa",
        &path(dir, "harbour.arpa"),
        "--arpa",
        &path(dir, "farm.arpa.gz"),
        "--fit-sentences",
        &path(dir, "dev.txt"),
        "--out",
        &path(dir, "mixed.arpa"),
        "--json",
    ]);
    assert!(output.status.success(), "{:?}", text(&output));
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let weights: f64 = report["components"]
        .as_array()
        .unwrap()
        .iter()
        .map(|row| row["weight"].as_f64().unwrap())
        .sum();
    assert!((weights - 1.0).abs() < 1e-9);
    for row in report["components"].as_array().unwrap() {
        assert!(
            report["perplexity"].as_f64().unwrap() <= row["perplexity"].as_f64().unwrap() + 1e-9
        );
    }

    let output = isogloss(&[
        "lm",
        "prune",
        "--arpa",
        &path(dir, "mixed.arpa"),
        "--max-entropy-loss",
        "1e-3",
        "--out",
        &path(dir, "pruned.arpa"),
        "--sentences",
        &path(dir, "dev.txt"),
    ]);
    let (stdout, stderr) = text(&output);
    assert!(output.status.success(), "{stderr}");
    assert!(
        stdout.contains("before:") && stdout.contains("after:") && stdout.contains("perplexity"),
        "{stdout}"
    );
}

#[test]
fn bad_input_exits_with_1_and_names_the_problem() {
    let folder = tempfile::tempdir().unwrap();
    let dir = folder.path();
    std::fs::write(dir.join("empty.txt"), "").unwrap();
    std::fs::write(dir.join("one.txt"), "a b c\n").unwrap();
    let output = isogloss(&[
        "lm",
        "build",
        "--sentences",
        &path(dir, "one.txt"),
        "--order",
        "7",
        "--out",
        &path(dir, "x.arpa"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    assert!(text(&output).1.contains("order 7"), "{:?}", text(&output));
    let output = isogloss(&[
        "lm",
        "build",
        "--sentences",
        &path(dir, "empty.txt"),
        "--order",
        "3",
        "--out",
        &path(dir, "x.arpa"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    assert!(text(&output).1.contains("empty.txt"), "{:?}", text(&output));
    std::fs::write(
        dir.join("bad.arpa"),
        "\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5\t</s>\nhigh\tword\n\n\\end\\\n",
    )
    .unwrap();
    let output = isogloss(&[
        "lm",
        "eval",
        "--arpa",
        &path(dir, "bad.arpa"),
        "--sentences",
        &path(dir, "one.txt"),
    ]);
    assert_eq!(output.status.code(), Some(1));
    let (_, stderr) = text(&output);
    assert!(
        stderr.contains("bad.arpa:6") && stderr.contains("'high'"),
        "{stderr}"
    );
}

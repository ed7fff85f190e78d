//! Self-training end to end (issue 18): `isogloss train --untranscribed` starting from the
//! shipped demo model, on a handful of demo utterances, one round of one epoch: the round runs,
//! writes its record into the round folder, the training log and `model.toml`, resumes as
//! complete, and a round whose rule keeps nothing says so and trains on the transcribed data.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use isogloss_acoustic::model::ModelDescription;

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn text(path: &Path) -> &str {
    path.to_str().expect("test paths are UTF-8")
}

/// Rows of a demo manifest by index, audio made absolute; `columns` transcript columns kept
/// (0: none, an untranscribed manifest); `rotate` gives each row the next row's transcripts.
fn manifest(
    dir: &Path,
    name: &str,
    split: &str,
    rows: std::ops::Range<usize>,
    columns: usize,
    rotate: bool,
) -> PathBuf {
    let source = fs::read_to_string(repo("tests/data/demo").join(format!("{split}.tsv"))).unwrap();
    let lines: Vec<Vec<String>> = source
        .lines()
        .skip(1)
        .map(|l| l.split('\t').map(str::to_string).collect())
        .collect();
    let header = [
        "id",
        "audio",
        "start",
        "end",
        "speaker",
        "dialect",
        "dialectal",
        "normalized",
    ];
    let mut out = header[..6 + columns].join("\t") + "\n";
    let picked: Vec<&Vec<String>> = rows.map(|i| &lines[i]).collect();
    for (k, row) in picked.iter().enumerate() {
        let mut fields: Vec<String> = row[..6].to_vec();
        fields[1] = repo("tests/data/demo").join(&row[1]).display().to_string();
        let source = if rotate {
            picked[(k + 1) % picked.len()]
        } else {
            row
        };
        fields.extend(source[6..6 + columns].iter().cloned());
        out.push_str(&fields.join("\t"));
        out.push('\n');
    }
    let path = dir.join(name);
    fs::write(&path, out).unwrap();
    path
}

fn self_train(
    out: &Path,
    dev: &Path,
    train: &Path,
    pool: &Path,
    rule: &[&str],
    resume: bool,
) -> Output {
    let mut command = Command::new(env!("CARGO_BIN_EXE_isogloss"));
    command
        .args(["train", "--manifest", text(train), "--dev", text(dev)])
        .args(["--column", "dialectal", "--out", text(out), "--epochs", "1"])
        .args(["--config", text(&repo("configs/tdnn-deep-robust.toml"))])
        .args(["--from", text(&repo("models/demo"))])
        .args(["--untranscribed", text(pool), "--rounds", "1"])
        .args(["--lm", text(&repo("models/demo-lm/indomain-3gram.arpa"))])
        .args([
            "--decode-lexicon",
            text(&repo("models/demo-lm/lexicon-grapheme.tsv")),
        ])
        .args(rule)
        .env("RAYON_NUM_THREADS", "2");
    if resume {
        command.arg("--resume");
    }
    command.output().expect("isogloss runs")
}

fn description(dir: &Path) -> ModelDescription {
    toml::from_str(&fs::read_to_string(dir.join("model.toml")).unwrap()).unwrap()
}

#[test]
fn a_round_runs_records_itself_and_resumes_as_complete() {
    let dir = tempfile::tempdir().unwrap();
    let train = manifest(dir.path(), "train.tsv", "train", 0..4, 2, false);
    let pool = manifest(dir.path(), "pool.tsv", "train", 4..10, 0, false);
    let dev = manifest(dir.path(), "dev.tsv", "dev", 0..4, 2, false);
    let out = dir.path().join("model");
    // A fixed threshold of 0 keeps every segment in which something was recognized.
    let run = self_train(
        &out,
        &dev,
        &train,
        &pool,
        &["--pseudo-threshold", "0"],
        false,
    );
    let stderr = String::from_utf8_lossy(&run.stderr);
    assert!(run.status.success(), "{stderr}");

    let rounds = description(&out).self_training;
    assert_eq!(rounds.len(), 1, "{rounds:?}");
    let round = &rounds[0];
    assert_eq!((round.round, round.threshold), (1, Some(0.0)));
    assert_eq!(round.offered_segments, 6);
    assert!(round.kept_segments > 0, "{round:?}");
    assert!(round.kept_hours > 0.0 && round.kept_hours <= round.offered_hours);
    assert_eq!(round.train_utterances, 4 + round.kept_segments);
    assert!(round.note.is_none());
    assert!(round.dev_wer_before.is_some() && round.dev_wer_after.is_some());
    // Both medians recorded, as certainties; the warning printed exactly when recorded.
    for median in [round.dev_median_confidence, round.pool_median_confidence] {
        assert!(
            matches!(median, Some(m) if m > 0.0 && m <= 1.0),
            "{round:?}"
        );
    }
    assert_eq!(
        round.warning.is_some(),
        stderr.contains("round 1: warning: the pool's median")
    );
    // The round trained at the default share (0.3) of the config's peak learning rate
    // (configs/tdnn-deep-robust.toml: 0.003), and its model says so.
    let rate = round
        .learning_rate
        .expect("the round's learning rate is recorded");
    assert!((rate - 0.3 * 0.003).abs() < 1e-12, "{rate}");
    let trained = description(&out.join("round-1")).training.unwrap();
    assert_eq!(trained.learning_rate, rate);
    assert!(stderr.contains("peak learning rate of"), "{stderr}");
    // The round's training manifest: the transcribed rows, then the pseudo-labels.
    let manifest = fs::read_to_string(out.join("round-1/train.tsv")).unwrap();
    assert_eq!(manifest.lines().count(), 1 + round.train_utterances);
    // One line per round in the training log, with the same figures.
    let log = fs::read_to_string(out.join("training.jsonl")).unwrap();
    let line: serde_json::Value = serde_json::from_str(log.lines().next().unwrap()).unwrap();
    assert_eq!(line["event"], "self_training_round");
    assert_eq!(line["kept_segments"], round.kept_segments);
    assert!(out.join("round-1/round.json").exists());
    // The model in OUT is the round's.
    assert_eq!(
        fs::read(out.join("model.safetensors")).unwrap(),
        fs::read(out.join("round-1/model.safetensors")).unwrap()
    );

    // Without --resume the folder is not overwritten; with it, the finished round is kept.
    let again = self_train(
        &out,
        &dev,
        &train,
        &pool,
        &["--pseudo-threshold", "0"],
        false,
    );
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("--resume"));
    let weights = fs::read(out.join("model.safetensors")).unwrap();
    let resumed = self_train(
        &out,
        &dev,
        &train,
        &pool,
        &["--pseudo-threshold", "0"],
        true,
    );
    let stderr = String::from_utf8_lossy(&resumed.stderr);
    assert!(resumed.status.success(), "{stderr}");
    assert!(stderr.contains("round 1: already complete"), "{stderr}");
    assert_eq!(fs::read(out.join("model.safetensors")).unwrap(), weights);
    assert_eq!(description(&out).self_training, rounds);
}

#[test]
fn a_round_that_keeps_nothing_is_reported_and_trains_on_the_transcribed_data() {
    let dir = tempfile::tempdir().unwrap();
    let train = manifest(dir.path(), "train.tsv", "train", 0..4, 2, false);
    let pool = manifest(dir.path(), "pool.tsv", "train", 4..8, 0, false);
    // Every dev reference is another utterance's sentence: no confidence level has a dev WER
    // of 0, so the rule with a target of 0 keeps nothing.
    let dev = manifest(dir.path(), "dev.tsv", "dev", 0..4, 2, true);
    let out = dir.path().join("model");
    let run = self_train(&out, &dev, &train, &pool, &["--pseudo-max-wer", "0"], false);
    let stderr = String::from_utf8_lossy(&run.stderr);
    assert!(run.status.success(), "{stderr}");
    assert!(stderr.contains("no segment kept"), "{stderr}");
    assert!(
        stderr.contains("trains on the transcribed data alone"),
        "{stderr}"
    );
    let round = &description(&out).self_training[0];
    assert_eq!(
        (round.threshold, round.kept_segments),
        (None, 0),
        "{round:?}"
    );
    assert_eq!(round.offered_segments, 4);
    assert_eq!(round.kept_hours, 0.0);
    assert_eq!(round.train_utterances, 4);
    assert!(round
        .note
        .as_deref()
        .unwrap()
        .contains("no confidence threshold"));
    assert!(round.rule.contains("at most 0.0 %"), "{}", round.rule);
    assert!(out.join("round-1/model.safetensors").exists());
}

#[test]
fn a_round_rate_share_outside_zero_to_one_is_refused_before_anything_runs() {
    let dir = tempfile::tempdir().unwrap();
    let train = manifest(dir.path(), "train.tsv", "train", 0..2, 2, false);
    let pool = manifest(dir.path(), "pool.tsv", "train", 2..4, 0, false);
    let dev = manifest(dir.path(), "dev.tsv", "dev", 0..2, 2, false);
    for share in ["0", "1.5", "-0.3"] {
        let out = dir.path().join(format!("model-{share}"));
        let flag = format!("--round-rate-share={share}");
        let run = self_train(&out, &dev, &train, &pool, &[&flag], false);
        let stderr = String::from_utf8_lossy(&run.stderr);
        assert!(!run.status.success(), "share {share}: {stderr}");
        assert!(
            stderr.contains("--round-rate-share") && stderr.contains(share),
            "{stderr}"
        );
        assert!(!out.exists(), "share {share}: nothing is written");
    }
}

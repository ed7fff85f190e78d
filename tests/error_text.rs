//! Every command over failing inputs (missing files, files that are not what they claim, bad
//! configuration, bad items in a batch), checked against the rule of `docs/exit-codes.md`: the
//! message names the file, and each piece of context (item, file, line, expected, found, OS
//! error) appears once. The repeats this guards against are the ones issue 20 quotes, e.g.
//! `missing.tsv: No such file or directory (os error 2): No such file or directory (os error 2)`.

use std::path::{Path, PathBuf};
use std::process::Command;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn path(path: &Path) -> &str {
    path.to_str().expect("test paths are UTF-8")
}

/// The first piece of context said twice in one line of output, if any: a segment of the
/// chain (the line split at `": "`) said twice, an OS error said twice, or `file` named twice.
fn repeat_in(line: &str, file: &str) -> Option<String> {
    let segments: Vec<&str> = line
        .split(": ")
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .collect();
    for (i, segment) in segments.iter().enumerate() {
        if segments[i + 1..].contains(segment) {
            return Some(format!("segment `{segment}`"));
        }
    }
    if line.matches("(os error").count() > 1 {
        return Some("the OS error".into());
    }
    if line.matches(file).count() > 1 {
        return Some(format!("the file `{file}`"));
    }
    None
}

/// A place in `file` spelled otherwise than `FILE, line N` (docs/exit-codes.md): `FILE:N` or
/// `FILE: line N`.
fn odd_location(line: &str, file: &str) -> Option<String> {
    line.match_indices(file).find_map(|(at, _)| {
        let after = &line[at + file.len()..];
        let colon_number = after
            .strip_prefix(':')
            .is_some_and(|rest| rest.starts_with(|c: char| c.is_ascii_digit()));
        (colon_number || after.starts_with(": line "))
            .then(|| format!("`{}`", &line[at..(at + file.len() + 8).min(line.len())]))
    })
}

/// Runs one failing command and checks its output against the rule.
fn check(args: &[&str], file: &str, exit_code: i32) {
    let output = Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the isogloss binary runs");
    let stdout = String::from_utf8_lossy(&output.stdout);
    let stderr = String::from_utf8_lossy(&output.stderr);
    let shown = format!("isogloss {}\n{stderr}", args.join(" "));
    assert_eq!(output.status.code(), Some(exit_code), "{shown}{stdout}");
    assert!(!stderr.contains("panicked"), "{shown}");
    // `corpus check` lists its problems on standard output; every other command on stderr.
    let lines: Vec<&str> = stderr.lines().chain(stdout.lines()).collect();
    assert!(
        lines.iter().any(|line| line.contains(file)),
        "`{file}` not named:\n{shown}{stdout}"
    );
    for line in lines {
        if let Some(repeat) = repeat_in(line, file) {
            panic!("{repeat} said twice in `{line}`:\n{shown}");
        }
        if let Some(place) = odd_location(line, file) {
            panic!("the place {place} is not spelled `FILE, line N` in `{line}`:\n{shown}");
        }
    }
}

#[test]
fn the_check_finds_the_repeats_quoted_in_issue_20() {
    let os = "No such file or directory (os error 2)";
    assert!(repeat_in(&format!("error: missing.tsv: {os}: {os}"), "missing.tsv").is_some());
    let item = format!("test-01769: a/test-01769.wav: a/test-01769.wav: cannot read: {os}: {os}");
    assert!(repeat_in(&item, "test-01769.wav").is_some());
    let named_twice = "cannot read a/x.wav: a/x.wav, line 2: bad";
    assert!(repeat_in(named_twice, "x.wav").is_some());
    assert_eq!(
        repeat_in(&format!("error: missing.tsv: {os}"), "missing.tsv"),
        None
    );
}

#[test]
fn a_place_is_spelled_one_way() {
    assert!(odd_location("error: lm/bad.arpa:6: expected a number", "bad.arpa").is_some());
    assert!(odd_location("error: bad.toml: line 2: expected `=`", "bad.toml").is_some());
    assert_eq!(
        odd_location("error: bad.arpa, line 6: expected a number", "bad.arpa"),
        None
    );
    assert_eq!(
        odd_location("error: bad.toml: unknown key", "bad.toml"),
        None
    );
}

#[test]
fn every_command_names_the_file_and_says_each_piece_once() {
    let dir = tempfile::tempdir().unwrap();
    let temp = |name: &str, text: &str| {
        let file = dir.path().join(name);
        std::fs::write(&file, text).unwrap();
        file
    };
    let out = |name: &str| dir.path().join(name).to_str().unwrap().to_string();
    let bad_toml = temp("bad.toml", "not a toml [[\n");
    let wrong_type = temp("wrong-type.toml", "[model]\nlayers = \"many\"\n");
    let bad_arpa = temp("bad.arpa", "garbage\n");
    let words = temp("words.txt", "wendle valley\n");
    let not_transcript = temp("other.json", "{\"results\": []}");
    let not_json = temp("broken.json", "{\n  \"items\": [,]\n}");
    let missing = dir.path().join("missing.tsv");
    let repo = repo();
    let score = repo.join("tests/fixtures/score");
    let corpus = repo.join("tests/fixtures/corpus");
    let reference = score.join("ref.tsv");
    let hypotheses = score.join("hyp_a.tsv");
    let speech = repo.join("tests/fixtures/audio/speech.wav");
    let not_audio = corpus.join("not-audio.wav");
    let bad_audio = corpus.join("bad-audio.tsv");
    let missing_column = corpus.join("missing-column.tsv");
    let model = repo.join("models/demo");
    let rules = repo.join("configs/rules-demo-dialectal.toml");
    let score_with = |extra: &[&str]| {
        let mut args = vec![
            "score",
            "--ref",
            path(&reference),
            "--column",
            "dialectal",
            "--hyp",
            path(&hypotheses),
        ];
        args.extend_from_slice(extra);
        args.into_iter().map(String::from).collect::<Vec<_>>()
    };
    let owned = |args: &[&str]| args.iter().map(|a| a.to_string()).collect::<Vec<_>>();
    let unknown = score.join("hyp_unknown.tsv");
    let duplicate = score.join("hyp_duplicate.tsv");
    let no_header = score.join("variants_without_header.tsv");

    // (arguments, the file the message must name, the exit code)
    let cases: Vec<(Vec<String>, String, i32)> = vec![
        (
            owned(&[
                "score",
                "--ref",
                path(&reference),
                "--column",
                "dialectal",
                "--hyp",
                path(&missing),
            ]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&[
                "score",
                "--ref",
                path(&missing),
                "--column",
                "dialectal",
                "--hyp",
                path(&hypotheses),
            ]),
            "missing.tsv".into(),
            1,
        ),
        (
            score_with(&["--compare", path(&unknown)]),
            "hyp_unknown.tsv".into(),
            1,
        ),
        (
            score_with(&["--compare", path(&duplicate)]),
            "hyp_duplicate.tsv".into(),
            1,
        ),
        (
            score_with(&["--variants", path(&no_header)]),
            "variants_without_header.tsv".into(),
            1,
        ),
        (
            score_with(&["--variants", path(&missing)]),
            "missing.tsv".into(),
            1,
        ),
        (score_with(&["--by", "region"]), "ref.tsv".into(), 1),
        (
            owned(&[
                "variants",
                "--manifest",
                path(&missing),
                "--from",
                "dialectal",
                "--to",
                "normalized",
                "--out",
                &out("v.tsv"),
            ]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&["corpus", "check", path(&missing)]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&["corpus", "check", path(&bad_audio)]),
            "not-audio.wav".into(),
            2,
        ),
        (
            owned(&["corpus", "split", path(&missing), "--out", &out("split")]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&[
                "corpus",
                "split",
                path(&missing_column),
                "--out",
                &out("split"),
            ]),
            "missing-column.tsv".into(),
            1,
        ),
        (
            owned(&["features", &out("missing.wav"), "--out", &out("f.st")]),
            "missing.wav".into(),
            1,
        ),
        (
            owned(&["features", path(&not_audio), "--out", &out("f.st")]),
            "not-audio.wav".into(),
            1,
        ),
        (
            owned(&[
                "features",
                path(&speech),
                "--out",
                &out("f.st"),
                "--config",
                path(&bad_toml),
            ]),
            "bad.toml".into(),
            1,
        ),
        (
            owned(&[
                "lm",
                "build",
                "--sentences",
                &out("missing.txt"),
                "--order",
                "3",
                "--out",
                &out("x.arpa"),
            ]),
            "missing.txt".into(),
            1,
        ),
        (
            owned(&[
                "lm",
                "eval",
                "--arpa",
                path(&bad_arpa),
                "--sentences",
                path(&words),
            ]),
            "bad.arpa".into(),
            1,
        ),
        (
            owned(&[
                "lm",
                "prune",
                "--arpa",
                path(&bad_arpa),
                "--max-entropy-loss",
                "0.1",
                "--out",
                &out("y.arpa"),
            ]),
            "bad.arpa".into(),
            1,
        ),
        (
            owned(&[
                "lexicon",
                "rules",
                "--words",
                &out("missing.txt"),
                "--rules",
                path(&rules),
                "--out",
                &out("l.tsv"),
            ]),
            "missing.txt".into(),
            1,
        ),
        (
            owned(&[
                "lexicon",
                "rules",
                "--words",
                path(&words),
                "--rules",
                path(&bad_toml),
                "--out",
                &out("l.tsv"),
            ]),
            "bad.toml".into(),
            1,
        ),
        (
            owned(&[
                "lexicon",
                "apply-g2p",
                "--model",
                &out("missing.g2p"),
                "--words",
                path(&words),
                "--out",
                &out("l.tsv"),
            ]),
            "missing.g2p".into(),
            1,
        ),
        (
            owned(&[
                "lexicon",
                "coverage",
                "--lexicon",
                path(&missing),
                "--manifest",
                path(&reference),
                "--column",
                "dialectal",
            ]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&[
                "train",
                "--manifest",
                path(&missing),
                "--dev",
                path(&missing),
                "--column",
                "dialectal",
                "--out",
                &out("model"),
            ]),
            "missing.tsv".into(),
            1,
        ),
        (
            owned(&[
                "train",
                "--manifest",
                path(&reference),
                "--dev",
                path(&reference),
                "--column",
                "dialectal",
                "--out",
                &out("model"),
                "--config",
                path(&wrong_type),
            ]),
            "wrong-type.toml".into(),
            1,
        ),
        (
            owned(&[
                "transcribe",
                "--model",
                &out("no-model"),
                "--manifest",
                path(&reference),
                "--out",
                &out("t.tsv"),
            ]),
            "no-model".into(),
            1,
        ),
        // A batch: the two bad items are listed, each with its audio file named once.
        (
            owned(&[
                "transcribe",
                "--model",
                path(&model),
                "--manifest",
                path(&bad_audio),
                "--out",
                &out("batch.tsv"),
            ]),
            "no-such-recording.flac".into(),
            2,
        ),
        (
            owned(&[
                "transcribe",
                "--model",
                path(&model),
                "--out",
                &out("one.tsv"),
                &out("missing.wav"),
            ]),
            "missing.wav".into(),
            2,
        ),
        (
            owned(&["review", path(&not_transcript), "--out", &out("review")]),
            "other.json".into(),
            1,
        ),
        (
            owned(&["review", path(&not_json), "--out", &out("review")]),
            "broken.json".into(),
            1,
        ),
        (
            owned(&["review", &out("missing.json"), "--out", &out("review")]),
            "missing.json".into(),
            1,
        ),
        (
            owned(&[
                "calibrate",
                "--transcript",
                &out("missing.json"),
                "--reference",
                path(&reference),
                "--column",
                "dialectal",
                "--out",
                &out("calibration"),
            ]),
            "missing.json".into(),
            1,
        ),
        (
            owned(&[
                "shortlist",
                path(&not_transcript),
                "--minutes",
                "5",
                "--out",
                &out("chosen.tsv"),
            ]),
            "other.json".into(),
            1,
        ),
        (
            owned(&["sweep", "--config", &out("missing.toml")]),
            "missing.toml".into(),
            1,
        ),
        (
            owned(&["sweep", "--config", path(&bad_toml)]),
            "bad.toml".into(),
            1,
        ),
    ];
    for (args, file, exit_code) in &cases {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        check(&args, file, *exit_code);
    }
}

//! End-to-end transcription with the shipped demo model: on the demo test split, decoding with
//! an n-gram LM and a lexicon at the default settings reaches the demo's measured error rates
//! and beats greedy decoding, with the flexible WER below the plain WER; a long interview
//! recording comes back as the words of its turns, at their times.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use isogloss_decoder::output::{TimedWord, TranscriptDocument};
use isogloss_lexicon::Lexicon;
use isogloss_lm::ArpaModel;
use isogloss_score::{align, tokenize, TokenRules, VariantMap};
use isogloss_sweep::resources::lm_words;

/// WER and flexible WER of the first interview with the shipped model (and its warp search,
/// choosing by the decoder), LM and lexicon at the default decoder settings, measured 28.3 % and
/// 25.7 % (272 reference words; the interviewer's questions are not in the LM's text). The
/// six-layer width-512 model before it got 25.7 % / 23.2 % at today's beam of 256 and 25.4 % /
/// 23.2 % at the beam of 16 (26.8 % / 23.9 % choosing the warp by the posteriors' confidence;
/// 27.2 % / 25.0 % without the warp search); 29.4 % / 26.5 % with the width-384 model before it,
/// 32.7 % / 29.4 % with the width-320 one,
/// 28.3 % / 25.0 % with the light-dose model before that, which did worse on every degraded
/// channel; 36.8 % / 33.5 % with the model of an early recipe. Plus about two points
/// (DEVELOPERS.md).
const MAX_INTERVIEW_WER: f64 = 0.303;
const MAX_INTERVIEW_FLEXIBLE_WER: f64 = 0.277;

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
        "--out",
        &text(&searched),
    ]);
    let (greedy_wer, _) = score(&greedy);
    let (wer, flexible_wer) = score(&searched);
    eprintln!("test split: greedy WER {greedy_wer:.3}, LM + lexicon WER {wer:.3} / flexible {flexible_wer:.3}");
    assert!(
        wer < greedy_wer,
        "LM + lexicon WER {wer} should be below greedy WER {greedy_wer}"
    );
    // The same LM and lexicon as `isogloss demo` at the default settings: the demo's measured
    // 10.4 % / 6.8 % (README) plus about two points, as in tests/demo_cli.rs.
    assert!(
        wer <= 0.124 && flexible_wer <= 0.088,
        "LM + lexicon WER {wer:.3} / flexible {flexible_wer:.3} above 0.124 / 0.088"
    );
    assert!(
        flexible_wer < wer,
        "flexible WER {flexible_wer} should be below plain WER {wer}"
    );
}

/// One turn of `interviews.tsv`: its times and its dialectal words.
struct Turn {
    start: f64,
    end: f64,
    words: Vec<String>,
}

fn interview_turns(audio: &str) -> Vec<Turn> {
    let text = std::fs::read_to_string(repo("tests/data/demo/interviews.tsv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let column = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let (file, start, end, dialectal) = (
        column("audio"),
        column("start"),
        column("end"),
        column("dialectal"),
    );
    lines
        .map(|line| line.split('\t').collect::<Vec<_>>())
        .filter(|fields| fields[file] == audio)
        .map(|fields| Turn {
            start: fields[start].parse().unwrap(),
            end: fields[end].parse().unwrap(),
            words: tokenize(fields[dialectal], &TokenRules::default()),
        })
        .collect()
}

/// The first interview, transcribed whole with the shipped LM and lexicon, is compared with the
/// turns of `interviews.tsv` (the generator's script and times): every recognized word lies
/// inside a turn, and the words of each turn, found by their times, match the turn's dialectal
/// transcript with a word error rate measured below.
#[test]
fn a_long_interview_comes_back_as_the_words_of_its_turns_at_their_times() {
    let dir = tempfile::tempdir().unwrap();
    let interview = repo("tests/data/demo/interviews/interview1.ogg");
    let out = dir.path().join("interview.json");
    isogloss(&[
        "transcribe",
        "--model",
        &text(&repo("models/demo")),
        "--lm",
        &text(&repo("models/demo-lm/indomain-3gram.arpa")),
        "--lexicon",
        &text(&repo("models/demo-lm/lexicon-grapheme.tsv")),
        "--format",
        "json",
        "--out",
        &text(&out),
        &text(&interview),
    ]);
    let document: TranscriptDocument =
        serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    assert_eq!(document.items.len(), 1);
    let tokens: Vec<&TimedWord> = document.items[0]
        .segments
        .iter()
        .flat_map(|s| &s.words)
        .collect();
    let duration = isogloss_audio::probe(&interview).unwrap().duration_seconds;
    for pair in tokens.windows(2) {
        assert!(
            pair[0].start <= pair[1].start + 1e-9,
            "times go backwards: {pair:?}"
        );
    }
    assert!(tokens
        .iter()
        .all(|w| 0.0 <= w.start && w.start <= w.end && w.end <= duration + 1e-6));

    let turns = interview_turns("interviews/interview1.ogg");
    assert_eq!(turns.len(), 30);
    // A word belongs to the turn its midpoint falls in, allowing 0.3 s at either end for the
    // model's timing (frames of 30 ms, the voice-activity padding).
    let mut heard: Vec<Vec<String>> = vec![Vec::new(); turns.len()];
    let mut outside = Vec::new();
    for w in &tokens {
        let middle = 0.5 * (w.start + w.end);
        match turns
            .iter()
            .position(|t| t.start - 0.3 <= middle && middle <= t.end + 0.3)
        {
            Some(turn) => heard[turn].push(w.word.clone()),
            None => outside.push((w.word.clone(), middle)),
        }
    }
    assert!(outside.is_empty(), "words in the pauses: {outside:?}");
    let variants =
        VariantMap::read(&repo("models/demo-variants.tsv"), &TokenRules::default()).unwrap();
    let (mut errors, mut flexible_errors, mut words) = (0u64, 0u64, 0usize);
    for (turn, hypothesis) in turns.iter().zip(&heard) {
        errors += align(&turn.words, hypothesis, &VariantMap::new()).cost();
        flexible_errors += align(&turn.words, hypothesis, &variants).cost();
        words += turn.words.len();
    }
    let wer = errors as f64 / words as f64;
    let flexible = flexible_errors as f64 / words as f64;
    eprintln!("interview1: {words} reference words, WER {wer:.3}, flexible WER {flexible:.3}");
    assert!(
        wer <= MAX_INTERVIEW_WER && flexible <= MAX_INTERVIEW_FLEXIBLE_WER,
        "interview WER {wer:.3} / flexible {flexible:.3} above {MAX_INTERVIEW_WER} / {MAX_INTERVIEW_FLEXIBLE_WER}"
    );
}

/// A model trained with per-speaker CMVN is decoded with per-segment statistics (transcribe
/// does not know a recording's speakers): transcribe still runs, and says so once, naming the
/// model's description; the shipped per-utterance model gets no such warning.
#[test]
fn a_speaker_normalized_model_is_transcribed_with_a_warning() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("speaker-cmvn");
    std::fs::create_dir(&model).unwrap();
    let shipped = repo("models/demo");
    std::fs::copy(
        shipped.join("model.safetensors"),
        model.join("model.safetensors"),
    )
    .unwrap();
    let description = std::fs::read_to_string(shipped.join("model.toml")).unwrap();
    assert_eq!(description.matches("cmvn = \"utterance\"").count(), 1);
    std::fs::write(
        model.join("model.toml"),
        description.replace("cmvn = \"utterance\"", "cmvn = \"speaker\""),
    )
    .unwrap();
    let speech = repo("tests/fixtures/audio/speech.wav");
    let warning = "the model was trained with cmvn = \"speaker\"";
    for (model, warned) in [(model.clone(), true), (shipped, false)] {
        let out = dir.path().join(format!("{warned}.tsv"));
        let output = isogloss(&[
            "transcribe",
            "--model",
            &text(&model),
            "--greedy",
            &text(&speech),
            "--out",
            &text(&out),
        ]);
        let stderr = String::from_utf8_lossy(&output.stderr);
        assert_eq!(
            stderr.matches(warning).count(),
            usize::from(warned),
            "{stderr}"
        );
        if warned {
            assert!(
                stderr.contains(&text(&model.join("model.toml"))),
                "{stderr}"
            );
        }
        assert!(out.exists());
    }
}

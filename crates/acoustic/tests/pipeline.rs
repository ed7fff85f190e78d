//! Training on real demo audio (tests/data/demo) and the errors a user gets for bad input.

use std::path::{Path, PathBuf};

#[path = "../../chart/tests/support/geometry.rs"]
mod geometry;

use isogloss_acoustic::config::ModelConfig;
use isogloss_acoustic::log::{read_epochs, CURVE_FILE};
use isogloss_acoustic::pipeline::{manifest_posteriors, train, TrainOptions};
use isogloss_acoustic::{greedy_decode, AcousticError, AcousticModel};
use isogloss_corpus::Manifest;

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/data/demo")
}

/// A manifest in `dir` listing demo utterances by absolute audio path.
fn manifest(dir: &Path, name: &str, ids: &[&str]) -> PathBuf {
    let source = std::fs::read_to_string(demo().join("train.tsv")).unwrap();
    let mut text = String::from("id\taudio\tstart\tend\tspeaker\tdialect\tdialectal\tnormalized\n");
    for id in ids {
        let line = source
            .lines()
            .find(|l| l.starts_with(&format!("{id}\t")))
            .unwrap_or_else(|| panic!("{id} is in the demo corpus"));
        let mut fields: Vec<String> = line.split('\t').map(str::to_string).collect();
        fields[1] = demo().join(&fields[1]).display().to_string();
        text.push_str(&fields.join("\t"));
        text.push('\n');
    }
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

const TINY: &str = r#"
[model]
normalization = "layer"
dropout = 0.0
layers = [
  { taps = [-2, -1, 0, 1, 2], width = 192 },
  { taps = [-1, 0, 1], width = 192 },
  { taps = [-1, 0, 1], width = 192, keep_every = 3 },
  { taps = [-1, 0, 1], width = 192 },
  { taps = [0], width = 192 },
]
[training]
epochs = 70
batch_frames = 4000
learning_rate = 0.003
warmup_share = 0.05
patience = 0
[augmentation]
speed_factors = []
vtlp = { probability = 0.0 }
reverb = { probability = 0.0 }
noise = { probability = 0.0 }
band_limit = { probability = 0.0 }
gain = { probability = 0.0 }
masks = { time_masks = 0, frequency_masks = 0 }
"#;

fn options(
    dir: &Path,
    train_manifest: PathBuf,
    dev_manifest: PathBuf,
    column: &str,
) -> TrainOptions {
    TrainOptions {
        train_manifest,
        dev_manifest,
        column: column.to_string(),
        out: dir.join("model"),
        config: ModelConfig::parse(TINY).unwrap(),
        epochs: None,
        minutes: None,
        resume: false,
        seed: 7,
        lexicon: None,
        start_from: None,
    }
}

#[test]
fn overfits_a_handful_of_demo_utterances() {
    let dir = tempfile::tempdir().unwrap();
    let ids = [
        "larch01-0006",
        "vale02-0008",
        "corran01-0003",
        "quays01-0019",
    ];
    let path = manifest(dir.path(), "few.tsv", &ids);
    let summary = train(
        &options(dir.path(), path.clone(), path.clone(), "normalized"),
        &mut |_| {},
    )
    .expect("training runs");
    let best = summary.best.expect("some epoch improved");
    assert!(
        best.dev_unit_error_rate < 0.05,
        "greedy unit error rate {best:?}"
    );

    // The saved model directory reproduces the transcripts through the public inference path.
    let model = AcousticModel::load(&dir.path().join("model")).unwrap();
    assert!((model.frame_shift_seconds() - 0.03).abs() < 1e-12);
    let manifest = Manifest::read(&path).unwrap();
    let posteriors = manifest_posteriors(&model, &manifest, &|_, _| {}).unwrap();
    let mut correct = 0;
    for (utterance, result) in manifest.utterances.iter().zip(posteriors) {
        let text = model
            .inventory()
            .to_text(&greedy_decode(&result.unwrap(), model.units()));
        correct += usize::from(text == utterance.transcripts[1]);
    }
    assert!(
        correct >= 3,
        "{correct} of 4 transcripts reproduced exactly"
    );

    // The training curve in the model directory shows every logged epoch at its figures and
    // marks the epoch the model directory holds.
    let epochs = read_epochs(&dir.path().join("model/training.jsonl")).unwrap();
    assert_eq!(epochs.len(), summary.epochs_done);
    let svg = std::fs::read_to_string(dir.path().join("model").join(CURVE_FILE)).unwrap();
    let points = geometry::curve_points(&svg);
    for (series, value) in [
        (
            "train loss",
            (|e| e.train_loss) as fn(&isogloss_acoustic::log::LoggedEpoch) -> f64,
        ),
        ("dev loss", |e| e.dev_loss),
        ("dev unit error rate", |e| 100.0 * e.dev_unit_error_rate),
    ] {
        assert_eq!(points[series].len(), epochs.len(), "{series}");
        for ((x, y), epoch) in points[series].iter().zip(&epochs) {
            assert!(
                (x - epoch.epoch as f64).abs() < 0.01,
                "{series}: epoch {} at {x}",
                epoch.epoch
            );
            // Coordinates are written to 0.01 px; an axis of 300 px spans at most 100 (%).
            assert!(
                (y - value(epoch)).abs() < 0.005,
                "{series}, epoch {}: {} drawn at {y}",
                epoch.epoch,
                value(epoch)
            );
        }
    }
    assert!(svg.contains(&format!(">kept: epoch {}</text>", best.epoch)));
}

#[test]
fn bad_input_gets_errors_naming_the_file_and_item() {
    let dir = tempfile::tempdir().unwrap();
    let good = manifest(dir.path(), "good.tsv", &["vale02-0008"]);
    let empty = manifest(dir.path(), "empty.tsv", &[]);

    let error = train(
        &options(dir.path(), empty.clone(), good.clone(), "normalized"),
        &mut |_| {},
    )
    .unwrap_err();
    assert!(matches!(error, AcousticError::Input { .. }), "{error}");
    assert!(error.to_string().contains("empty.tsv") && error.to_string().contains("no utterances"));

    let error = train(
        &options(dir.path(), good.clone(), good.clone(), "phonetic"),
        &mut |_| {},
    )
    .unwrap_err();
    let message = error.to_string();
    assert!(
        message.contains("good.tsv") && message.contains("phonetic"),
        "{message}"
    );

    // A lexicon that lacks every word of the transcript.
    let lexicon = dir.path().join("lexicon.tsv");
    std::fs::write(&lexicon, "zzyzx\tz ih z ih k s\n").unwrap();
    let mut with_lexicon = options(dir.path(), good.clone(), good.clone(), "normalized");
    with_lexicon.lexicon = Some(lexicon);
    let error = train(&with_lexicon, &mut |_| {}).unwrap_err();
    let message = error.to_string();
    assert!(
        matches!(error, AcousticError::NotInLexicon { .. }),
        "{message}"
    );
    assert!(
        message.contains("good.tsv, line 2") && message.contains("not in the lexicon"),
        "{message}"
    );

    let mut resume = options(dir.path(), good.clone(), good, "normalized");
    resume.resume = true;
    let error = train(&resume, &mut |_| {}).unwrap_err();
    assert!(error.to_string().contains("no checkpoint"), "{error}");
}

/// A warm start (`start_from`) loads the shipped demo model's weights: after one epoch at the
/// bottom of its warm-up the model still transcribes demo training utterances about as well as
/// the shipped model, where the same epoch from a random start knows nothing yet. A network
/// other than the model's is refused, naming the table that differs.
#[test]
fn a_warm_start_begins_from_the_model_and_refuses_another_network() {
    let dir = tempfile::tempdir().unwrap();
    let ids = [
        "larch01-0006",
        "vale02-0008",
        "corran01-0003",
        "quays01-0019",
    ];
    let path = manifest(dir.path(), "few.tsv", &ids);
    let shipped = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../models/demo");
    let demo_config = ModelConfig::read(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("../../configs/tdnn-demo.toml"),
    )
    .unwrap();
    let run = |name: &str, start_from: Option<PathBuf>| {
        let mut options = options(dir.path(), path.clone(), path.clone(), "dialectal");
        options.out = dir.path().join(name);
        options.config = demo_config.clone();
        options.epochs = Some(1);
        options.start_from = start_from;
        train(&options, &mut |_| {}).expect("training runs")
    };
    let warm = run("warm", Some(shipped.clone()));
    let scratch = run("scratch", None);
    let warm_rate = warm.best.unwrap().dev_unit_error_rate;
    let scratch_rate = scratch.best.unwrap().dev_unit_error_rate;
    assert!(
        warm_rate < 0.2 && scratch_rate > 0.5,
        "unit error rate after one epoch: warm {warm_rate}, from scratch {scratch_rate}"
    );
    let description = AcousticModel::load(&dir.path().join("warm")).unwrap();
    assert_eq!(
        description.description().provenance.started_from,
        Some(shipped.display().to_string())
    );

    let mut other = options(dir.path(), path.clone(), path, "dialectal");
    other.out = dir.path().join("other");
    other.start_from = Some(shipped);
    let error = train(&other, &mut |_| {}).unwrap_err();
    let message = error.to_string();
    assert!(
        message.contains("model.toml") && message.contains("[model]"),
        "{message}"
    );
}

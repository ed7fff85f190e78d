//! Training on real demo audio (tests/data/demo) and the errors a user gets for bad input.

use std::path::{Path, PathBuf};

#[path = "../../chart/tests/support/geometry.rs"]
mod geometry;

use isogloss_acoustic::audio_set::{AudioSet, AudioUtterance, PcmStore, Perturbation};
use isogloss_acoustic::config::ModelConfig;
use isogloss_acoustic::data::{utterance_rng, TrainingData};
use isogloss_acoustic::log::{read_epochs, CURVE_FILE};
use isogloss_acoustic::model::{ModelDescription, Provenance, MODEL_FORMAT};
use isogloss_acoustic::pipeline::{manifest_posteriors, train, PipelineEvent, TrainOptions};
use isogloss_acoustic::speaker_vectors::train_extractor;
use isogloss_acoustic::tdnn::initial_parameters;
use isogloss_acoustic::units::UnitInventory;
use isogloss_acoustic::{greedy_decode, AcousticError, AcousticModel};
use isogloss_corpus::Manifest;
use isogloss_features::{Cmvn, FeatureExtractor, SpecAugment};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/data/demo")
}

/// How many utterances of the manifest at `path` the model's greedy transcript reproduces
/// exactly (normalized writing, the manifest's second transcript column).
fn exact_transcripts(model: &AcousticModel, path: &Path) -> usize {
    let manifest = Manifest::read(path).unwrap();
    let posteriors = manifest_posteriors(model, &manifest, &|_, _| {}).unwrap();
    let mut correct = 0;
    for (utterance, result) in manifest.utterances.iter().zip(posteriors) {
        let text = model
            .inventory()
            .to_text(&greedy_decode(&result.unwrap()[0], model.units()));
        correct += usize::from(text == utterance.transcripts[1]);
    }
    correct
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

/// Four demo utterances, one each of four speakers and dialects.
const FEW: [&str; 4] = [
    "larch01-0006",
    "vale02-0008",
    "corran01-0003",
    "quays01-0019",
];

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
        prefetch: true,
    }
}

#[test]
fn overfits_a_handful_of_demo_utterances() {
    let dir = tempfile::tempdir().unwrap();
    let path = manifest(dir.path(), "few.tsv", &FEW);
    let summary = train(
        &options(dir.path(), path.clone(), path.clone(), "normalized"),
        &mut |_| {},
    )
    .expect("training runs");
    let best = summary.kept.expect("an epoch is kept");
    assert!(
        best.dev_unit_error_rate < 0.05,
        "greedy unit error rate {best:?}"
    );

    // The saved model directory reproduces the transcripts through the public inference path.
    let model = AcousticModel::load(&dir.path().join("model")).unwrap();
    assert!((model.frame_shift_seconds() - 0.03).abs() < 1e-12);
    // Trained without vocal-tract warping: no warp search at test time.
    assert!(model.inference().is_none());
    let correct = exact_transcripts(&model, &path);
    assert!(
        correct >= 3,
        "{correct} of 4 transcripts reproduced exactly"
    );

    // The training curve in the model directory shows every logged epoch at its figures and
    // marks the epoch the model directory holds.
    let epochs = read_epochs(&dir.path().join("model/training.jsonl")).unwrap();
    assert_eq!(epochs.len(), summary.epochs_done);
    // `keep = "last"` (the default): every epoch was written, and the directory holds the last.
    assert!(epochs.iter().all(|e| e.saved()));
    assert_eq!(best.epoch, summary.epochs_done);
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
    let path = manifest(dir.path(), "few.tsv", &FEW);
    let shipped = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../models/demo");
    let demo_config = ModelConfig::read(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("../../configs/tdnn-deep-robust.toml"),
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
    let warm_rate = warm.kept.unwrap().dev_unit_error_rate;
    let scratch_rate = scratch.kept.unwrap().dev_unit_error_rate;
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

/// `[training] average_share = 0.5` over four epochs: the model directory holds the mean the
/// checkpoint carries (epochs 3 and 4), not the last epoch's weights; `model.toml` counts the
/// averaged epochs and gives the mean's dev figures, as the log's last epoch does.
#[test]
fn an_averaged_run_writes_the_mean_weights_and_says_so() {
    let dir = tempfile::tempdir().unwrap();
    let path = manifest(dir.path(), "few.tsv", &FEW);
    let mut options = options(dir.path(), path.clone(), path, "dialectal");
    options.epochs = Some(4);
    options.config.training.average_share = 0.5;
    let summary = train(&options, &mut |_| {}).expect("training runs");
    let out = dir.path().join("model");
    let model = AcousticModel::load(&out).unwrap();
    let provenance = &model.description().provenance;
    assert_eq!((provenance.epochs, provenance.averaged_epochs), (4, 2));
    let epochs: Vec<serde_json::Value> = std::fs::read_to_string(out.join("training.jsonl"))
        .unwrap()
        .lines()
        .map(|line| serde_json::from_str(line).unwrap())
        .filter(|line: &serde_json::Value| line["event"] == "epoch")
        .collect();
    let counted: Vec<Option<u64>> = epochs
        .iter()
        .map(|e| e["average"]["epochs"].as_u64())
        .collect();
    assert_eq!(counted, [None, None, Some(1), Some(2)]);
    let last = &epochs[3]["average"];
    assert_eq!(last["dev_loss"].as_f64(), Some(provenance.dev_loss));
    assert_eq!(
        last["dev_unit_error_rate"].as_f64(),
        Some(provenance.dev_unit_error_rate)
    );
    assert_eq!(summary.kept.unwrap().average.unwrap().epochs, 2);
    let saved =
        candle_core::safetensors::load(out.join("model.safetensors"), &candle_core::Device::Cpu)
            .unwrap();
    let checkpoint = candle_core::safetensors::load(
        out.join("checkpoint.safetensors"),
        &candle_core::Device::Cpu,
    )
    .unwrap();
    let values = |t: &candle_core::Tensor| t.flatten_all().unwrap().to_vec1::<f32>().unwrap();
    assert!(!saved.is_empty());
    for (name, tensor) in &saved {
        assert_eq!(
            values(tensor),
            values(&checkpoint[&format!("average/{name}")]),
            "{name}"
        );
        assert_ne!(
            values(tensor),
            values(&checkpoint[&format!("param/{name}")]),
            "{name}"
        );
    }
}

/// A small extractor for the demo utterances: 8 Gaussians, 4-dimensional vectors, a 2 s window
/// recomputed every 20 frames.
const SPEAKER_VECTORS: &str = r#"
[speaker_vectors]
input = "frames"
[speaker_vectors.extractor]
dimension = 4
iterations = 2
window_seconds = 2.0
period_frames = 20
[speaker_vectors.extractor.ubm]
gaussians = 8
iterations = 2
"#;

/// Options that train the tiny network with the `[speaker_vectors]` table `vectors` on four
/// demo utterances (training and dev alike), and the manifest of those utterances.
fn speaker_vector_run(dir: &Path, vectors: &str) -> (TrainOptions, PathBuf) {
    let path = manifest(dir, "few.tsv", &FEW);
    let mut options = options(dir, path.clone(), path.clone(), "normalized");
    options.config = ModelConfig::parse(&format!("{TINY}{vectors}")).unwrap();
    (options, path)
}

/// Issue 15: a model with speaker vectors trains its extractor first, keeps it in the model
/// directory, and transcribes from the directory alone; a resumed run reads the extractor from
/// the cache instead of training it again; an extractor that does not fit the model is refused
/// with its file named.
#[test]
fn a_model_with_speaker_vectors_trains_and_transcribes_from_its_directory_alone() {
    let dir = tempfile::tempdir().unwrap();
    let (mut options, path) = speaker_vector_run(dir.path(), SPEAKER_VECTORS);
    let mut extractor_steps = 0;
    let summary = train(&options, &mut |event| {
        if let PipelineEvent::SpeakerVectors(_) = event {
            extractor_steps += 1;
        }
    })
    .expect("training runs");
    let vectors = options.config.speaker_vectors.clone().unwrap();
    assert_eq!(
        extractor_steps,
        isogloss_speaker::training_steps(&vectors.extractor)
    );
    let best = summary.kept.expect("an epoch is kept");
    assert!(
        best.dev_unit_error_rate < 0.05,
        "greedy unit error rate {best:?}"
    );

    // Only the four files of the model directory travel.
    let moved = dir.path().join("moved");
    std::fs::create_dir(&moved).unwrap();
    for file in [
        "model.toml",
        "model.safetensors",
        "ivector.toml",
        "ivector.safetensors",
    ] {
        std::fs::copy(dir.path().join("model").join(file), moved.join(file)).unwrap();
    }
    let model = AcousticModel::load(&moved).unwrap();
    assert_eq!(model.description().speaker_vectors.as_ref(), Some(&vectors));
    assert_eq!(model.speaker_vectors().unwrap().output_dimension(), 4);
    let correct = exact_transcripts(&model, &path);
    assert!(
        correct >= 3,
        "{correct} of 4 transcripts reproduced exactly"
    );
    // An utterance of one frame is shorter than the network's context: padded, not refused.
    let one = ndarray::Array2::<f32>::zeros((1, 39));
    assert_eq!(model.log_posteriors(&one).unwrap().nrows(), 1);
    // A non-finite feature is named with its frame.
    let mut bad = ndarray::Array2::<f32>::zeros((30, 39));
    bad[(12, 3)] = f32::NAN;
    let message = model.log_posteriors(&bad).unwrap_err().to_string();
    assert!(
        message.contains("frame 12") && message.contains("dimension 3"),
        "{message}"
    );

    // Resuming reads the extractor from the cache.
    options.resume = true;
    options.epochs = Some(summary.epochs_done + 1);
    let mut cached = false;
    train(&options, &mut |event| {
        assert!(!matches!(event, PipelineEvent::SpeakerVectors(_)));
        cached |= matches!(event, PipelineEvent::SpeakerVectorsCached);
    })
    .unwrap();
    assert!(cached);

    // An extractor of other dimensions in the directory is refused, naming its file.
    let mut other = vectors.extractor.clone();
    other.dimension = 3;
    let frames = |offset: f32| {
        ndarray::Array2::from_shape_fn((200, 39), |(t, d)| {
            offset + ((t * 7 + d * 3) % 11) as f32 / 5.0
        })
    };
    let features = vec![
        ("a".into(), "a".into(), frames(0.0)),
        ("b".into(), "b".into(), frames(1.0)),
    ];
    train_extractor(&other, 39, &moved, &features, &mut |_| {}).unwrap();
    let message = AcousticModel::load(&moved).err().unwrap().to_string();
    assert!(
        message.contains(&moved.join("ivector.toml").display().to_string())
            && message.contains("3-dimensional")
            && message.contains("takes 4"),
        "{message}"
    );
    // Missing: the error names the file.
    std::fs::remove_file(moved.join("ivector.safetensors")).unwrap();
    let message = AcousticModel::load(&moved).err().unwrap().to_string();
    assert!(message.contains("ivector.safetensors"), "{message}");
}

/// Issue 15, the per-layer variant (`input = "layers"`): the vector also enters every later
/// hidden layer. Such a model trains, and transcribes from its directory alone, its
/// description recording where the vector enters; the weights of those layers have the
/// vector's rows.
#[test]
fn a_model_with_speaker_vectors_at_every_layer_trains_and_transcribes() {
    let dir = tempfile::tempdir().unwrap();
    let layers = SPEAKER_VECTORS.replace(r#"input = "frames""#, r#"input = "layers""#);
    let (options, path) = speaker_vector_run(dir.path(), &layers);
    let summary = train(&options, &mut |_| {}).expect("training runs");
    let best = summary.kept.expect("an epoch is kept");
    assert!(
        best.dev_unit_error_rate < 0.05,
        "greedy unit error rate {best:?}"
    );
    let model = AcousticModel::load(&dir.path().join("model")).unwrap();
    let vectors = model.description().speaker_vectors.clone().unwrap();
    assert_eq!(
        vectors.input,
        isogloss_acoustic::config::VectorInput::Layers
    );
    let input = model.description().network_input();
    assert_eq!((input.frame_dims, input.layer_vector_dims), (39 + 4, 4));
    let tensors = candle_core::safetensors::load(
        dir.path().join("model").join("model.safetensors"),
        &candle_core::Device::Cpu,
    )
    .unwrap();
    let first_width = options.config.model.layers[0].width;
    assert_eq!(tensors["layers.1.weight"].dims()[0], first_width + 4);
    let correct = exact_transcripts(&model, &path);
    assert!(
        correct >= 3,
        "{correct} of 4 transcripts reproduced exactly"
    );
}

/// Issue 15: the network reads in training what it reads in transcription. For the same audio,
/// an epoch's training features (here without perturbation) equal the network input the model
/// computes from the features `isogloss transcribe` computes (extraction, then per-utterance
/// CMVN), vectors included; with SpecAugment masks on, the vectors are still those of the
/// unmasked features.
#[test]
fn training_and_transcription_give_the_network_the_same_speaker_vectors() {
    let dir = tempfile::tempdir().unwrap();
    let ids = &FEW[..3];
    let path = manifest(dir.path(), "few.tsv", ids);
    let manifest = Manifest::read(&path).unwrap();
    let mut config = ModelConfig::parse(&format!(
        "{TINY}{SPEAKER_VECTORS}\n[features]\ncmvn = \"utterance\"\n"
    ))
    .unwrap();
    config
        .speaker_vectors
        .as_mut()
        .unwrap()
        .extractor
        .min_frames = 1;
    let (store, failures) =
        PcmStore::open_or_build(&dir.path().join("train.pcm"), &manifest, "test", &|_, _| {})
            .unwrap();
    assert!(failures.is_empty());
    let front_end = FeatureExtractor::new(&config.features).unwrap();
    let utterances: Vec<AudioUtterance> = manifest
        .utterances
        .iter()
        .enumerate()
        .map(|(row, u)| AudioUtterance {
            id: u.id.clone(),
            row,
            speaker: u.speaker.clone(),
            labels: vec![1],
            frames: front_end
                .config()
                .frame_count(store.sample_count(row).unwrap()),
        })
        .collect();
    let samples: Vec<Vec<f32>> = (0..ids.len())
        .map(|row| store.samples(row).unwrap().unwrap())
        .collect();
    let no_perturbation = |masks| Perturbation {
        speed_factors: vec![],
        waveform: None,
        vtlp: config.augmentation.vtlp.clone(),
        masks,
    };
    let mut set = AudioSet::new(
        store,
        utterances,
        &config.features,
        Default::default(),
        no_perturbation(None),
    )
    .unwrap();
    let vectors = config.speaker_vectors.clone().unwrap();
    let outcome = train_extractor(
        &vectors.extractor,
        39,
        &dir.path().join("ivector"),
        &set.clean_training_features().unwrap(),
        &mut |_| {},
    )
    .unwrap();
    let extractor = outcome.extractor;
    set.set_speaker_vectors(extractor.clone());

    let units = UnitInventory::graphemes(["abc de"]);
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let parameters =
        initial_parameters(&config.model, config.input_dims(), units.len(), &mut rng).unwrap();
    let description = ModelDescription {
        format: MODEL_FORMAT,
        units,
        features: config.features.clone(),
        architecture: config.model.clone(),
        provenance: Provenance::default(),
        training: None,
        augmentation: None,
        self_training: Vec::new(),
        speaker_vectors: Some(vectors),
        inference: None,
    };
    let model = AcousticModel::from_parameters(description, &parameters)
        .unwrap()
        .with_speaker_vectors(extractor, Path::new("ivector.toml"))
        .unwrap();

    // What `isogloss transcribe` hands the model: the segment's features normalised by its own
    // statistics (crates/cli/src/commands/transcribe.rs).
    let transcribed = |samples: &[f32]| {
        let mut features = front_end.extract(samples);
        let cmvn =
            Cmvn::from_features(&features, config.features.unit_variance, "segment").unwrap();
        cmvn.apply(&mut features, "segment").unwrap();
        model.network_input(&features).unwrap().into_owned()
    };
    for (i, samples) in samples.iter().enumerate() {
        let trained = set.features(i, &mut utterance_rng(1, 1, i), &|_| true);
        let inferred = transcribed(samples);
        assert_eq!(trained.dim(), (inferred.nrows(), 39 + 4));
        assert_eq!(trained, inferred, "utterance {i}");
        // The vectors change over the utterance (the window fills), so the check has teeth.
        let vector = |t: usize| trained.row(t).slice(ndarray::s![39..]).to_owned();
        assert_ne!(vector(0), vector(trained.nrows() - 1));
    }

    let masks = SpecAugment {
        time_masks: 2,
        max_time_width: 20,
        max_time_fraction: 0.3,
        frequency_masks: 2,
        max_frequency_width: 5,
        ..config.augmentation.masks.clone()
    };
    let mut masked = AudioSet::new(
        PcmStore::open_or_build(&dir.path().join("train.pcm"), &manifest, "test", &|_, _| {})
            .unwrap()
            .0,
        (0..ids.len())
            .map(|row| AudioUtterance {
                id: manifest.utterances[row].id.clone(),
                row,
                speaker: manifest.utterances[row].speaker.clone(),
                labels: vec![1],
                frames: 0,
            })
            .collect(),
        &config.features,
        Default::default(),
        no_perturbation(Some((masks, 3))),
    )
    .unwrap();
    masked.set_speaker_vectors(model.speaker_vectors().unwrap().clone());
    for (i, samples) in samples.iter().enumerate() {
        let trained = masked.features(i, &mut utterance_rng(1, 1, i), &|_| true);
        let inferred = transcribed(samples);
        assert_ne!(
            trained.slice(ndarray::s![.., ..39]),
            inferred.slice(ndarray::s![.., ..39]),
            "the masks hid something"
        );
        assert_eq!(
            trained.slice(ndarray::s![.., 39..]),
            inferred.slice(ndarray::s![.., 39..]),
            "utterance {i}"
        );
    }
}

/// `manifest_posteriors` (what `sweep` and `demo` decode) and `segment_readings` (what
/// `transcribe` decodes) agree under the shipped model's warp search: the same three readings
/// in the same order, the first the most confident (`segment_posteriors`); an utterance whose
/// audio fails is its own error, the others unaffected.
#[test]
fn the_warp_search_gives_the_same_posteriors_to_sweep_and_transcribe() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
    let model = AcousticModel::load(&root.join("models/demo")).unwrap();
    assert!(model.inference().is_some());
    let lines: Vec<String> = std::fs::read_to_string(demo().join("cross-phone.tsv"))
        .unwrap()
        .lines()
        .take(4)
        .map(str::to_string)
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let mut text = lines
        .join("\n")
        .replace("\tcross/", &format!("\t{}/cross/", demo().display()));
    text.push_str("\nbroken-0001\tnowhere.ogg\t\t\tbroken\tfells\ta\ta\n");
    let path = dir.path().join("some.tsv");
    std::fs::write(&path, text).unwrap();
    let manifest = Manifest::read(&path).unwrap();
    let posteriors = manifest_posteriors(&model, &manifest, &|_, _| {}).unwrap();
    assert_eq!(posteriors.len(), 4);
    assert!(posteriors[3].as_ref().unwrap_err().contains("line 5"));
    let extractor = FeatureExtractor::new(model.feature_config()).unwrap();
    let mut factors = Vec::new();
    for (utterance, result) in manifest.utterances.iter().zip(&posteriors).take(3) {
        let samples = isogloss_audio::read_segments(&utterance.audio, &[utterance.segment()])
            .unwrap()
            .remove(0);
        let readings = model.segment_readings(&extractor, &samples).unwrap();
        let (first, factor) = model.segment_posteriors(&extractor, &samples).unwrap();
        let result = result.as_ref().unwrap();
        assert_eq!(result.len(), 3);
        assert_eq!(readings.len(), 3);
        for (k, (posteriors, _)) in readings.iter().enumerate() {
            assert_eq!(&result[k], posteriors, "{} reading {k}", utterance.id);
        }
        assert_eq!(result[0], first);
        assert_eq!(readings[0].1, factor);
        let confidences: Vec<f64> = result
            .iter()
            .map(isogloss_acoustic::warp_search::confidence)
            .collect();
        assert!(
            confidences.windows(2).all(|c| c[0] >= c[1]),
            "{confidences:?}"
        );
        factors.push(factor);
    }
    eprintln!("factors chosen: {factors:?}");
}

/// A run that warps the mel filter bank writes the test-time warp search of its range into
/// `model.toml` (docs/model-directory.md, `[inference]`).
#[test]
fn training_with_vocal_tract_warping_writes_the_warp_search() {
    let dir = tempfile::tempdir().unwrap();
    let path = manifest(dir.path(), "few.tsv", &FEW);
    let mut options = options(dir.path(), path.clone(), path, "normalized");
    options.config.training.epochs = 1;
    options.config.augmentation.vtlp = isogloss_features::VtlpConfig {
        probability: 0.5,
        warp_factor: [0.92, 1.08],
        boundary_hz: 4500.0,
    };
    train(&options, &mut |_| {}).unwrap();
    let model = AcousticModel::load(&dir.path().join("model")).unwrap();
    let search = model.inference().expect("a warp search");
    assert_eq!(search.warp_factors, [1.0, 0.92, 1.08]);
    assert_eq!(search.warp_boundary_hz, 4500.0);
    let text = std::fs::read_to_string(dir.path().join("model/model.toml")).unwrap();
    assert!(text.contains("\n[inference]\n"), "{text}");
}

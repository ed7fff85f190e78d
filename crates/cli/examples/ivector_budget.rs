//! What the i-vector extractor costs beside the acoustic model, on the demo corpus.
//!
//! Computes the features of the demo train and test splits as the shipped demo model takes them
//! (MFCC + Δ + ΔΔ, per-utterance CMVN; cached under `--cache`), trains an extractor on the train
//! split (33 minutes, 705 utterances; settings from `--config FILE`, else the defaults) and
//! prints its wall and CPU time. Then, in `--rounds` interleaved rounds over the 128 test
//! utterances (6.1 minutes), it times the acoustic model's forward pass
//! (`AcousticModel::log_posteriors`) and the extractor in online and per-utterance mode, and
//! prints each as process CPU time per frame and the extractor's share of the acoustic time.
//!
//! Run (one thread, so that CPU time is not inflated by idle worker threads):
//! `RAYON_NUM_THREADS=1 cargo run --release -p isogloss --example ivector_budget -- [--rounds 3]
//! [--config extractor.toml] [--cache DIR] [--model DIR] [--width N]` (`--model`: another model
//! directory whose forward pass to time, default `models/demo`; `--width N`: time instead a
//! freshly initialised network of the same layers with every hidden layer N wide, the same cost
//! as a trained one of that shape).

use std::path::{Path, PathBuf};
use std::time::Instant;

use isogloss_acoustic::pipeline::{manifest_features, normalize};
use isogloss_acoustic::tdnn::{initial_parameters, initial_statistics};
use isogloss_acoustic::AcousticModel;
use isogloss_corpus::Manifest;
use isogloss_speaker::{
    ExtractorConfig, FeatureLayout, IvectorExtractor, TrainingEvent, TrainingStage, Utterance,
};
use ndarray::Array2;
use rand::SeedableRng;

/// CPU time of the whole process (all threads), in seconds.
fn process_cpu_seconds() -> f64 {
    let mut now = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: clock_gettime writes one timespec through a valid pointer to a local.
    let status = unsafe { libc::clock_gettime(libc::CLOCK_PROCESS_CPUTIME_ID, &mut now) };
    assert_eq!(status, 0, "the process CPU clock is not available");
    now.tv_sec as f64 + now.tv_nsec as f64 * 1e-9
}

fn option(name: &str) -> Option<String> {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1).cloned())
}

/// (id, speaker, normalised features) of every utterance of a manifest whose audio reads.
fn features(
    manifest_path: &Path,
    model: &AcousticModel,
    cache: &Path,
) -> Vec<(String, String, Array2<f32>)> {
    let manifest = Manifest::read(manifest_path).expect("demo manifest");
    let name = manifest_path.file_stem().unwrap_or_default();
    let computed = manifest_features(
        &manifest,
        model.feature_config(),
        Some(&cache.join(name)),
        &|_, _| {},
    )
    .expect("features");
    let mut items = Vec::new();
    let mut matrices = Vec::new();
    for (utterance, result) in manifest.utterances.iter().zip(computed) {
        match result {
            Ok(variants) => {
                items.push((utterance.id.clone(), utterance.speaker.clone()));
                matrices.push(variants);
            }
            Err(problem) => eprintln!("left out: {problem}"),
        }
    }
    let speakers: Vec<&str> = items.iter().map(|(_, s)| s.as_str()).collect();
    normalize(&mut matrices, &speakers, model.feature_config()).expect("normalisation");
    items
        .into_iter()
        .zip(matrices)
        .map(|((id, speaker), mut variants)| (id, speaker, variants.remove(0)))
        .collect()
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
    let rounds: usize = option("--rounds").and_then(|v| v.parse().ok()).unwrap_or(3);
    let cache = option("--cache")
        .map(PathBuf::from)
        .unwrap_or_else(|| std::env::temp_dir().join("isogloss-ivector-budget"));
    let config = match option("--config") {
        Some(path) => ExtractorConfig::from_toml_file(Path::new(&path)).expect("extractor config"),
        None => ExtractorConfig::default(),
    };
    let model_dir = option("--model")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("models/demo"));
    let mut model = AcousticModel::load(&model_dir).expect("acoustic model");
    if let Some(width) = option("--width").and_then(|v| v.parse::<usize>().ok()) {
        // The same network with every hidden layer `width` wide, freshly initialised: its
        // forward pass costs what a trained one of that shape costs.
        let mut description = model.description().clone();
        for layer in &mut description.architecture.layers {
            layer.width = width;
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(384);
        let mut tensors = initial_parameters(
            &description.architecture,
            description.network_input(),
            description.units.len(),
            &mut rng,
        )
        .expect("initial parameters");
        tensors.extend(initial_statistics(&description.architecture).expect("statistics"));
        model = AcousticModel::from_parameters(description, &tensors).expect("wider model");
    }
    println!(
        "acoustic model: {} hidden layers of widths {:?}",
        model.description().architecture.layers.len(),
        model
            .description()
            .architecture
            .layers
            .iter()
            .map(|l| l.width)
            .collect::<Vec<_>>()
    );
    let demo = root.join("tests/data/demo");
    let train = features(&demo.join("train.tsv"), &model, &cache);
    let test = features(&demo.join("test.tsv"), &model, &cache);
    let train_frames: usize = train.iter().map(|(_, _, f)| f.nrows()).sum();
    let test_frames: usize = test.iter().map(|(_, _, f)| f.nrows()).sum();

    let utterances: Vec<Utterance> = train
        .iter()
        .map(|(id, speaker, features)| Utterance {
            id,
            speaker,
            features: features.view(),
        })
        .collect();
    let layout = FeatureLayout {
        dims: model.feature_config().dims(),
        frame_shift_seconds: model.feature_config().hop_seconds(),
    };
    println!(
        "training the extractor on {} utterances, {train_frames} frames ({:.1} min): {} Gaussians, dimension {}, top {}, period {} frames, window {} s",
        utterances.len(),
        train_frames as f64 / 6000.0,
        config.ubm.gaussians,
        config.dimension,
        config.top_gaussians,
        config.period_frames,
        config.window_seconds
    );
    let started = Instant::now();
    let cpu_started = process_cpu_seconds();
    let mut ubm_done = None;
    let (extractor, report) = IvectorExtractor::train(&config, layout, &utterances, &mut |event| {
        if let TrainingEvent::Step {
            stage: TrainingStage::Statistics { .. },
            ..
        } = event
        {
            ubm_done.get_or_insert(started.elapsed().as_secs_f64());
        }
    })
    .expect("training");
    let wall = started.elapsed().as_secs_f64();
    println!(
        "training: {wall:.1} s wall ({:.1} s UBM and statistics, {:.1} s T and post-processing), {:.1} s CPU; UBM log-likelihood per frame {:.3}, T log-likelihood per frame {:?}",
        ubm_done.unwrap_or(wall),
        wall - ubm_done.unwrap_or(wall),
        process_cpu_seconds() - cpu_started,
        report.ubm_log_likelihoods.last().copied().unwrap_or(f64::NAN),
        report
            .total_variability_log_likelihoods
            .iter()
            .map(|v| (v * 1000.0).round() / 1000.0)
            .collect::<Vec<_>>()
    );

    let (mut acoustic, mut online, mut utterance) = (Vec::new(), Vec::new(), Vec::new());
    for round in 1..=rounds {
        let cpu = process_cpu_seconds();
        for (_, _, features) in &test {
            std::hint::black_box(model.log_posteriors(features).expect("forward pass"));
        }
        acoustic.push((process_cpu_seconds() - cpu) / test_frames as f64 * 1e6);
        let cpu = process_cpu_seconds();
        for (id, _, features) in &test {
            std::hint::black_box(
                extractor
                    .online_ivectors(id, features.view())
                    .expect("online"),
            );
        }
        online.push((process_cpu_seconds() - cpu) / test_frames as f64 * 1e6);
        let cpu = process_cpu_seconds();
        for (id, _, features) in &test {
            std::hint::black_box(extractor.extract(id, features.view()).expect("utterance"));
        }
        utterance.push((process_cpu_seconds() - cpu) / test_frames as f64 * 1e6);
        println!(
            "round {round} over {test_frames} test frames, µs CPU per frame: acoustic model {:.2}, online i-vectors {:.2} ({:.1} %), per-utterance i-vectors {:.2} ({:.1} %)",
            acoustic[round - 1],
            online[round - 1],
            100.0 * online[round - 1] / acoustic[round - 1],
            utterance[round - 1],
            100.0 * utterance[round - 1] / acoustic[round - 1],
        );
    }
    let (a, o, u) = (
        median(&mut acoustic),
        median(&mut online),
        median(&mut utterance),
    );
    println!(
        "medians: acoustic {a:.2} µs/frame, online {o:.2} µs/frame ({:.1} %), per utterance {u:.2} µs/frame ({:.1} %)",
        100.0 * o / a,
        100.0 * u / a
    );
}

//! Inference cost of the normalisations (a benchmark, not a test): `log_posteriors` of one
//! utterance through fresh models of one configuration with `normalization = "batch"` (running
//! statistics applied at every call), `"none"` (what folding the statistics into the weights
//! and biases would leave) and `"layer"`, interleaved.
//!
//! `RAYON_NUM_THREADS=1 cargo bench -p isogloss-acoustic --bench inference -- --frames 300`
//! (`--rounds`, `--calls`, `--config`). Prints one JSON line per normalisation: the median over
//! rounds of the median process CPU time of a call.

use isogloss_acoustic::config::{ModelConfig, Normalization};
use isogloss_acoustic::model::{ModelDescription, Provenance, MODEL_FORMAT};
use isogloss_acoustic::train::Trainer;
use isogloss_acoustic::units::{UnitInventory, UnitKind};
use isogloss_acoustic::AcousticModel;
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// CPU time consumed by the process (all its threads), in seconds.
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

fn median(mut values: Vec<f64>) -> f64 {
    values.sort_by(|a, b| a.total_cmp(b));
    values[values.len() / 2]
}

fn main() {
    let (mut frames, mut rounds, mut calls) = (300usize, 7usize, 15usize);
    let mut config_path = None;
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < args.len() {
        let value = args.get(i + 1).cloned().unwrap_or_default();
        match args[i].as_str() {
            "--frames" => frames = value.parse().unwrap_or(frames),
            "--rounds" => rounds = value.parse().unwrap_or(rounds),
            "--calls" => calls = value.parse().unwrap_or(calls),
            "--config" => config_path = Some(value),
            _ => {
                i += 1;
                continue;
            }
        }
        i += 2;
    }
    let base = match config_path {
        Some(path) => ModelConfig::read(std::path::Path::new(&path)).expect("readable config"),
        None => ModelConfig::small(),
    };
    let units = UnitInventory {
        kind: UnitKind::Phones,
        units: (0..40)
            .map(|u| {
                if u == 0 {
                    "<ctc-blank>".to_string()
                } else {
                    format!("u{u}")
                }
            })
            .collect(),
    };
    let dims = base.features.dims();
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let features = Array2::from_shape_fn((frames, dims), |_| rng.random_range(-1.0f32..1.0));
    let models: Vec<(Normalization, AcousticModel)> = [
        Normalization::Batch,
        Normalization::None,
        Normalization::Layer,
    ]
    .into_iter()
    .map(|normalization| {
        let mut config = base.clone();
        config.model.normalization = normalization;
        let trainer = Trainer::new(config.clone(), units.clone(), dims, 0).expect("valid model");
        let description = ModelDescription {
            format: MODEL_FORMAT,
            units: units.clone(),
            features: config.features.clone(),
            architecture: config.model.clone(),
            provenance: Provenance::default(),
            training: None,
            augmentation: None,
            self_training: Vec::new(),
            speaker_vectors: None,
            inference: None,
        };
        let model = AcousticModel::from_parameters(description, &trainer.model_tensors());
        (normalization, model.expect("valid model"))
    })
    .collect();
    let mut per_round: Vec<Vec<f64>> = vec![Vec::new(); models.len()];
    for _ in 0..rounds {
        for (times, (_, model)) in per_round.iter_mut().zip(&models) {
            let mut call_times = Vec::with_capacity(calls);
            for _ in 0..calls {
                let start = process_cpu_seconds();
                let posteriors = model.log_posteriors(&features).expect("inference runs");
                std::hint::black_box(posteriors);
                call_times.push(process_cpu_seconds() - start);
            }
            times.push(median(call_times));
        }
    }
    for (times, (normalization, _)) in per_round.iter().zip(&models) {
        let rounds: Vec<String> = times.iter().map(|t| format!("{:.3}", t * 1e3)).collect();
        println!(
            "{{\"normalization\": \"{normalization:?}\", \"threads\": \"{}\", \"frames\": {frames}, \"median_call_cpu_ms\": {:.3}, \"rounds_ms\": [{}]}}",
            std::env::var("RAYON_NUM_THREADS").unwrap_or_else(|_| "default".into()),
            median(times.clone()) * 1e3,
            rounds.join(", ")
        );
    }
}

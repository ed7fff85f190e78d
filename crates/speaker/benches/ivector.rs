//! Training and extraction cost of the i-vector extractor on synthetic features shaped like the
//! demo corpus: 39-dimensional frames, 24 speakers, about 40 minutes (240 000 frames) for
//! training, 128 utterances of about 3 s for extraction. The frames come from a 64-class mixture
//! whose means each speaker shifts along a random low-rank subspace (invented data; the costs do
//! not depend on the values).
//!
//! Prints wall time and process CPU time (all threads) of training (UBM and T separately) and
//! the CPU time per frame of extraction in online and per-utterance mode.
//!
//! Run: `cargo bench -p isogloss-speaker --bench ivector -- [--gaussians N] [--dimension R]
//! [--period K] [--top N] [--stride S] [--minutes M] [--rounds N]` (each defaults to the
//! extractor's default setting; 40 minutes, 3 rounds). The acoustic model's share is measured by the `isogloss` crate's
//! example `ivector_budget` on the demo corpus.

use std::time::Instant;

use isogloss_speaker::{
    ExtractorConfig, FeatureLayout, IvectorExtractor, TrainingEvent, TrainingStage, Utterance,
};
use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const DIMS: usize = 39;
const CLASSES: usize = 64;

/// CPU time of the whole process (all threads, rayon's included), in seconds.
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

fn normal(rng: &mut ChaCha8Rng) -> f32 {
    let u: f32 = rng.random_range(f32::MIN_POSITIVE..1.0);
    let v: f32 = rng.random_range(0.0..1.0);
    (-2.0 * u.ln()).sqrt() * (2.0 * std::f32::consts::PI * v).cos()
}

fn argument(name: &str, default: f64) -> f64 {
    let args: Vec<String> = std::env::args().collect();
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

struct Speaker {
    shift: Array2<f32>,
}

fn utterance(
    rng: &mut ChaCha8Rng,
    means: &Array2<f32>,
    speaker: &Speaker,
    frames: usize,
) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((frames, DIMS));
    let mut class = 0;
    for t in 0..frames {
        if t % 8 == 0 {
            class = rng.random_range(0..CLASSES);
        }
        for d in 0..DIMS {
            out[(t, d)] = means[(class, d)] + speaker.shift[(class, d)] + 0.6 * normal(rng);
        }
    }
    out
}

fn main() {
    let defaults = ExtractorConfig::default();
    let gaussians = argument("--gaussians", defaults.ubm.gaussians as f64) as usize;
    let dimension = argument("--dimension", defaults.dimension as f64) as usize;
    let period = argument("--period", defaults.period_frames as f64) as usize;
    let top = argument("--top", defaults.top_gaussians as f64) as usize;
    let stride = argument("--stride", defaults.frame_stride as f64) as usize;
    let minutes = argument("--minutes", 40.0);
    let rounds = argument("--rounds", 3.0) as usize;

    let mut rng = ChaCha8Rng::seed_from_u64(15);
    let means = Array2::from_shape_fn((CLASSES, DIMS), |_| 2.0 * normal(&mut rng));
    let basis = Array2::from_shape_fn((CLASSES * DIMS, 8), |_| 0.3 * normal(&mut rng));
    let speakers: Vec<Speaker> = (0..30)
        .map(|_| {
            let w = Array1::from_iter((0..8).map(|_| normal(&mut rng)));
            Speaker {
                shift: basis
                    .dot(&w)
                    .into_shape_with_order((CLASSES, DIMS))
                    .unwrap(),
            }
        })
        .collect();
    let train_frames = (minutes * 6000.0) as usize;
    let mut train = Vec::new();
    let mut total = 0;
    while total < train_frames {
        let k = train.len() % 24;
        let frames = rng.random_range(150..500);
        train.push((
            format!("spk{k}"),
            utterance(&mut rng, &means, &speakers[k], frames),
        ));
        total += frames;
    }
    let test: Vec<Array2<f32>> = (0..128)
        .map(|i| {
            let frames = rng.random_range(150..430);
            utterance(&mut rng, &means, &speakers[24 + i % 6], frames)
        })
        .collect();
    let test_frames: usize = test.iter().map(|u| u.nrows()).sum();

    let config = ExtractorConfig {
        dimension,
        period_frames: period,
        top_gaussians: top,
        frame_stride: stride,
        ubm: isogloss_speaker::UbmConfig {
            gaussians,
            ..Default::default()
        },
        ..ExtractorConfig::default()
    };
    let ids: Vec<String> = (0..train.len()).map(|i| format!("utt{i}")).collect();
    let utterances: Vec<Utterance> = train
        .iter()
        .zip(&ids)
        .map(|((speaker, features), id)| Utterance {
            id,
            speaker,
            features: features.view(),
        })
        .collect();
    println!(
        "training on {} utterances, {total} frames ({:.1} min); {gaussians} Gaussians, i-vector dimension {dimension}, top {top}, stride {stride}, period {period}",
        utterances.len(),
        total as f64 / 6000.0
    );
    let started = Instant::now();
    let cpu_started = process_cpu_seconds();
    let mut ubm_done = None;
    let layout = FeatureLayout {
        dims: DIMS,
        frame_shift_seconds: 0.01,
    };
    let (extractor, _) = IvectorExtractor::train(&config, layout, &utterances, &mut |event| {
        if let TrainingEvent::Step {
            stage: TrainingStage::Statistics { .. },
            ..
        } = event
        {
            ubm_done.get_or_insert((started.elapsed().as_secs_f64(), process_cpu_seconds()));
        }
    })
    .unwrap();
    let (wall, cpu) = (
        started.elapsed().as_secs_f64(),
        process_cpu_seconds() - cpu_started,
    );
    let (ubm_wall, ubm_cpu) = ubm_done.unwrap_or((wall, cpu));
    println!(
        "training: {wall:.1} s wall, {cpu:.1} s CPU (UBM and statistics {ubm_wall:.1} s wall, {:.1} s CPU; T {:.1} s wall)",
        ubm_cpu - cpu_started,
        wall - ubm_wall
    );

    for round in 1..=rounds {
        let cpu_started = process_cpu_seconds();
        for (i, features) in test.iter().enumerate() {
            let vectors = extractor
                .online_ivectors(&format!("test{i}"), features.view())
                .unwrap();
            std::hint::black_box(vectors);
        }
        let online = process_cpu_seconds() - cpu_started;
        let cpu_started = process_cpu_seconds();
        for (i, features) in test.iter().enumerate() {
            std::hint::black_box(
                extractor
                    .extract(&format!("test{i}"), features.view())
                    .unwrap(),
            );
        }
        let per_utterance = process_cpu_seconds() - cpu_started;
        println!(
            "round {round}: extraction over {test_frames} frames: online {:.2} µs CPU/frame, per utterance {:.2} µs CPU/frame",
            online / test_frames as f64 * 1e6,
            per_utterance / test_frames as f64 * 1e6
        );
    }
}

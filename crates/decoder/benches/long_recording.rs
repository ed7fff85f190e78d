//! Memory and speed of the long-recording path: a synthetic recording of N hours (speech-like
//! bursts in faint noise, generated chunk by chunk, never held whole) goes through voice-activity
//! segmentation and parallel beam search. A stand-in acoustic model makes peaky posteriors
//! (one random letter at the start of every 50 ms of loud audio, blank elsewhere). Prints the
//! peak resident memory, which should not grow with N.
//!
//! Run: `cargo bench -p isogloss-decoder --bench long_recording -- HOURS` (default 0.5)

use std::time::Instant;

use isogloss_decoder::pipeline::{transcribe_stream, StreamSettings};
use isogloss_decoder::segment::VadConfig;
use isogloss_decoder::{
    DecodeError, NoLanguageModel, PrefixBeamSearch, SearchGraph, SearchOptions,
};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const RATE: usize = 16_000;

fn peak_resident_kib() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1).and_then(|v| v.parse().ok()))
        })
        .unwrap_or(0)
}

fn main() {
    let hours: f64 = std::env::args()
        .skip(1)
        .find_map(|a| a.parse().ok())
        .unwrap_or(0.5);
    let mut units = vec!["<ctc-blank>".to_string()];
    units.extend("abcdefghijklmnopqrstuvwxyz".chars().map(|c| c.to_string()));
    units.push("<wb>".to_string());
    let graph = SearchGraph::lexicon_free(units.clone()).expect("units");
    let unit_count = units.len();
    // speech-like bursts: 1–8 s of talk, 0.3–3 s of pause
    let total_seconds = (hours * 3600.0) as usize;
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut plan = Vec::new();
    let mut t = 0.5;
    while t < total_seconds as f64 {
        let talk = rng.random_range(1.0..8.0);
        plan.push((t, t + talk));
        t += talk + rng.random_range(0.3..3.0);
    }
    let chunks = (0..total_seconds).map(move |second| {
        let mut noise = ChaCha8Rng::seed_from_u64(second as u64);
        let samples = (0..RATE)
            .map(|n| {
                let time = second as f64 + n as f64 / RATE as f64;
                let i = plan.partition_point(|&(_, end)| end <= time);
                let loud = plan.get(i).is_some_and(|&(start, _)| time >= start);
                let envelope = (std::f64::consts::PI * 4.0 * time).sin().abs();
                let tone = (2.0 * std::f64::consts::PI * 170.0 * time).sin();
                let speech = if loud { 0.3 * envelope * tone } else { 0.0 };
                (speech + noise.random_range(-0.002..0.002)) as f32
            })
            .collect::<Vec<f32>>();
        Ok::<_, DecodeError>(samples)
    });
    let posteriors = |samples: &[f32]| -> Result<Vec<(Array2<f32>, f64)>, DecodeError> {
        let frames = samples.len() / 160;
        let mut rng = ChaCha8Rng::seed_from_u64(samples.len() as u64);
        let mut out = Array2::from_elem((frames, unit_count), (1e-5f32).ln());
        for t in 0..frames {
            let frame = &samples[t * 160..(t + 1) * 160];
            let loud = frame.iter().any(|x| x.abs() > 0.05);
            let unit = if loud && t % 5 == 0 {
                rng.random_range(1..unit_count)
            } else {
                0
            };
            out[[t, unit]] = (1.0 - 1e-5 * (unit_count - 1) as f32).ln();
        }
        Ok(vec![(out, 0.01)])
    };
    let settings = StreamSettings {
        sample_rate: RATE as u32,
        vad: VadConfig::default(),
        batch_segments: 2 * rayon::current_num_threads(),
    };
    let lm = NoLanguageModel;
    let started = Instant::now();
    let segments = transcribe_stream(
        chunks,
        &settings,
        posteriors,
        || PrefixBeamSearch::new(&graph, &lm, SearchOptions::default()),
        |_| {},
    )
    .expect("transcribe");
    let words: usize = segments.iter().map(|s| s.words.len()).sum();
    println!(
        "{hours} h: {} segments, {words} words, {:.1} s wall on {} threads, peak resident memory {} MiB",
        segments.len(),
        started.elapsed().as_secs_f64(),
        rayon::current_num_threads(),
        peak_resident_kib() / 1024
    );
}

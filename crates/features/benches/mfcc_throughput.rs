//! Throughput of the default front end (MFCC + Δ + ΔΔ, and log-mel fbank) on one core, as a
//! multiple of real time. A benchmark, not a test: `cargo bench -p isogloss-features`
//! (`scripts/bench/features_bench.py` runs it beside librosa and reports the ratio).
//!
//! Flags after `--`: `--seconds S` of audio (default 60, the committed espeak-ng sentence repeated),
//! `--runs R` timed runs (default 15, after 2 warm-up runs), `--json` for one JSON line per kind.

use std::hint::black_box;
use std::path::Path;
use std::time::Instant;

use isogloss_features::{FeatureConfig, FeatureExtractor};

fn main() {
    let mut seconds = 60.0f64;
    let mut runs = 15usize;
    let mut json = false;
    let mut args = std::env::args().skip(1);
    while let Some(arg) = args.next() {
        match arg.as_str() {
            "--seconds" => seconds = parse(args.next(), "--seconds"),
            "--runs" => runs = parse(args.next(), "--runs"),
            "--json" => json = true,
            // `cargo bench` passes `--bench` to harness-less benchmarks.
            "--bench" => {}
            other => fail(&format!("unknown flag {other}")),
        }
    }
    let audio = repeated_speech(seconds);
    for (name, config) in [
        ("mfcc+delta+delta-delta", FeatureConfig::default()),
        ("fbank", FeatureConfig::fbank()),
    ] {
        let extractor = FeatureExtractor::new(&config).unwrap_or_else(|e| fail(&e.to_string()));
        for _ in 0..2 {
            black_box(extractor.extract(black_box(&audio)));
        }
        let mut times: Vec<f64> = (0..runs.max(1))
            .map(|_| {
                let start = Instant::now();
                black_box(extractor.extract(black_box(&audio)));
                start.elapsed().as_secs_f64()
            })
            .collect();
        times.sort_by(f64::total_cmp);
        let median = times[times.len() / 2];
        let frames = config.frame_count(audio.len());
        if json {
            println!(
                "{{\"kind\":\"{name}\",\"audio_seconds\":{seconds},\"frames\":{frames},\"runs\":{},\"median_seconds\":{median},\"fastest_seconds\":{},\"real_time_factor\":{}}}",
                times.len(),
                times[0],
                seconds / median
            );
        } else {
            println!(
                "{name}: {seconds} s of audio ({frames} frames), median {:.2} ms over {} runs = {:.0}× real time ({:.2} µs/frame; fastest {:.0}×)",
                median * 1e3,
                times.len(),
                seconds / median,
                median * 1e6 / frames as f64,
                seconds / times[0]
            );
        }
    }
}

/// The committed 16 kHz test sentence, repeated to `seconds` of audio.
fn repeated_speech(seconds: f64) -> Vec<f32> {
    let path =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures/features/speech.wav");
    let mut reader =
        hound::WavReader::open(&path).unwrap_or_else(|e| fail(&format!("{}: {e}", path.display())));
    let sentence: Vec<f32> = reader
        .samples::<i16>()
        .map(|s| {
            f32::from(s.unwrap_or_else(|e| fail(&format!("{}: {e}", path.display())))) / 32768.0
        })
        .collect();
    let wanted = (seconds * 16_000.0) as usize;
    sentence.iter().copied().cycle().take(wanted).collect()
}

fn parse<T: std::str::FromStr>(value: Option<String>, flag: &str) -> T {
    value
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| fail(&format!("{flag} needs a number")))
}

fn fail(message: &str) -> ! {
    eprintln!("mfcc_throughput: {message}");
    std::process::exit(1)
}

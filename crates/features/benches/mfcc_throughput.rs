//! Throughput of the default front end (MFCC + Δ + ΔΔ, and log-mel) on one core, as a
//! multiple of real time. A benchmark, not a test: `cargo bench -p isogloss-features`
//! (`scripts/bench/features_bench.py` runs it beside librosa and reports the ratio).
//!
//! Flags after `--`: `--seconds S` of audio (default 60, the committed espeak-ng sentence repeated),
//! `--runs R` timed runs (default 15, after 10 warm-up runs), `--json` for one JSON line per kind.
//!
//! Two clocks: wall-clock time, and the CPU time of this thread. On a shared machine the wall clock
//! mostly measures how long the scheduler kept us waiting; the thread's CPU time is the cost of the
//! work itself, which is what "throughput on one core" means.

mod support;

use std::hint::black_box;
use std::time::Instant;

use isogloss_features::{FeatureConfig, FeatureExtractor};
use support::{fail, parse, repeated_speech, thread_cpu_seconds};

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
        ("logmel", FeatureConfig::logmel()),
    ] {
        let extractor = FeatureExtractor::new(&config).unwrap_or_else(|e| fail(&e.to_string()));
        for _ in 0..10 {
            black_box(extractor.extract(black_box(&audio)));
        }
        let (mut wall, mut cpu): (Vec<f64>, Vec<f64>) = (0..runs.max(1))
            .map(|_| {
                let (start, start_cpu) = (Instant::now(), thread_cpu_seconds());
                black_box(extractor.extract(black_box(&audio)));
                (
                    start.elapsed().as_secs_f64(),
                    thread_cpu_seconds() - start_cpu,
                )
            })
            .unzip();
        wall.sort_by(f64::total_cmp);
        cpu.sort_by(f64::total_cmp);
        let (wall_median, cpu_median) = (wall[wall.len() / 2], cpu[cpu.len() / 2]);
        let frames = config.frame_count(audio.len());
        if json {
            println!(
                "{{\"kind\":\"{name}\",\"audio_seconds\":{seconds},\"frames\":{frames},\"runs\":{},\"wall_median_seconds\":{wall_median},\"cpu_median_seconds\":{cpu_median}}}",
                wall.len(),
            );
        } else {
            println!(
                "{name}: {seconds} s of audio ({frames} frames), {} runs: CPU median {:.2} ms = {:.0}× real time ({:.2} µs/frame); wall median {:.2} ms = {:.0}×",
                wall.len(),
                cpu_median * 1e3,
                seconds / cpu_median,
                cpu_median * 1e6 / frames as f64,
                wall_median * 1e3,
                seconds / wall_median,
            );
        }
    }
}

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

/// CPU time consumed by the calling thread, in seconds.
fn thread_cpu_seconds() -> f64 {
    let mut now = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: clock_gettime writes one timespec through a valid pointer to a local.
    let status = unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut now) };
    if status != 0 {
        fail("the thread CPU clock is not available");
    }
    now.tv_sec as f64 + now.tv_nsec as f64 * 1e-9
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

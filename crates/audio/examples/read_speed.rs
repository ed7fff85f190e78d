//! Benchmark (not a test): how many times faster than real time files are decoded, mixed to
//! mono and resampled to 16 kHz, whole and in 30 s chunks.
//!
//! `cargo run --release -p isogloss-audio --example read_speed -- FILE...`

use std::path::PathBuf;
use std::time::Instant;

use isogloss_audio::{probe, read_mono_16k, ChunkReader, SAMPLE_RATE};

fn main() {
    let files: Vec<PathBuf> = std::env::args_os().skip(1).map(PathBuf::from).collect();
    if files.is_empty() {
        eprintln!("usage: read_speed FILE...");
        std::process::exit(1);
    }
    for file in files {
        let info = match probe(&file) {
            Ok(info) => info,
            Err(error) => {
                eprintln!("{error}");
                continue;
            }
        };
        let started = Instant::now();
        let samples = match read_mono_16k(&file) {
            Ok(samples) => samples,
            Err(error) => {
                eprintln!("{error}");
                continue;
            }
        };
        let whole = started.elapsed().as_secs_f64();
        let started = Instant::now();
        let mut streamed = 0usize;
        let reader = ChunkReader::open(&file, 30 * SAMPLE_RATE as usize);
        for chunk in reader.into_iter().flatten() {
            match chunk {
                Ok(chunk) => streamed += chunk.len(),
                Err(error) => {
                    eprintln!("{error}");
                    break;
                }
            }
        }
        let chunked = started.elapsed().as_secs_f64();
        assert_eq!(
            streamed,
            samples.len(),
            "chunks must add up to the whole file"
        );
        println!(
            "{}: {:.1} s at {} Hz × {} ch: whole {:.0}× real time, 30 s chunks {:.0}× real time",
            file.display(),
            info.duration_seconds,
            info.sample_rate,
            info.channels,
            info.duration_seconds / whole,
            info.duration_seconds / chunked
        );
    }
}

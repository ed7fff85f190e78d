//! What the feature benchmarks share: test audio, the thread's CPU clock, flag parsing.

use std::path::Path;

/// The committed 16 kHz espeak-ng test sentence, repeated to `seconds` of audio.
pub fn repeated_speech(seconds: f64) -> Vec<f32> {
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
pub fn thread_cpu_seconds() -> f64 {
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

/// The number after a flag, or exit with a message.
pub fn parse<T: std::str::FromStr>(value: Option<String>, flag: &str) -> T {
    value
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| fail(&format!("{flag} needs a number")))
}

/// Prints `message` after the benchmark's name and exits with status 1.
pub fn fail(message: &str) -> ! {
    eprintln!("{}: {message}", env!("CARGO_CRATE_NAME"));
    std::process::exit(1)
}

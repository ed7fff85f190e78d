//! Writes re-voiced copies of recordings, to listen to what `[augmentation.revoice]` does or
//! to transcribe them.
//!
//! ```sh
//! cargo run --release -p isogloss-audio --example revoice -- OUT_DIR F0_HZ IN.ogg [IN2.wav …]
//! ```
//!
//! Each input becomes `OUT_DIR/<name>.wav` (16 kHz, 16 bit), its source replaced by one at
//! `F0_HZ` with 2 semitones of intonation, breathiness 0.1 and no tilt; the generator is seeded
//! from the file's position in the list, so a rerun writes the same files.

use std::path::{Path, PathBuf};

use isogloss_audio::augment::{revoice, RevoiceSettings};
use isogloss_audio::{read_mono_16k, SAMPLE_RATE};
use rand::SeedableRng;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.len() < 3 {
        return Err("usage: revoice OUT_DIR F0_HZ IN… (see the example's header)".into());
    }
    let out = PathBuf::from(&args[0]);
    let f0_hz: f64 = args[1]
        .parse()
        .map_err(|_| format!("F0_HZ: expected a number of hertz, found {:?}", args[1]))?;
    std::fs::create_dir_all(&out)?;
    let settings = RevoiceSettings {
        f0_hz,
        intonation_semitones: 2.0,
        breath: 0.1,
        tilt: 0.0,
        bandwidth_factor: 1.0,
    };
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: SAMPLE_RATE,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    for (index, input) in args[2..].iter().enumerate() {
        let path = Path::new(input);
        let mut samples = read_mono_16k(path).map_err(|e| format!("{input}: {e}"))?;
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(index as u64);
        if !revoice(&mut samples, &settings, &mut rng) {
            eprintln!("{input}: too short or silent, copied unchanged");
        }
        let name = path.file_stem().unwrap_or_default().to_string_lossy();
        let mut writer = hound::WavWriter::create(out.join(format!("{name}.wav")), spec)?;
        for s in samples {
            writer.write_sample((s.clamp(-1.0, 1.0) * 32_767.0).round() as i16)?;
        }
        writer.finalize()?;
    }
    Ok(())
}

//! Real decoding of each container on a short synthetic utterance (espeak-ng), made by
//! `scripts/make-audio-fixtures.sh`.

use std::path::PathBuf;

use isogloss_audio::{probe, read_mono_16k, read_segments, verify, Segment, SAMPLE_RATE};

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/audio")
        .join(name)
}

/// Signal-to-difference ratio in dB of `other` against `reference` over their common length.
fn snr_db(reference: &[f32], other: &[f32]) -> f64 {
    let n = reference.len().min(other.len());
    let signal: f64 = reference[..n].iter().map(|&x| f64::from(x).powi(2)).sum();
    let noise: f64 = reference[..n]
        .iter()
        .zip(&other[..n])
        .map(|(&a, &b)| f64::from(a - b).powi(2))
        .sum();
    10.0 * (signal / noise).log10()
}

#[test]
fn wav_header_and_length() {
    let info = probe(&fixture("speech.wav")).unwrap();
    // Values as `soxi` reports them for the committed file.
    assert_eq!(
        (info.sample_rate, info.channels, info.frames),
        (22_050, 1, 33_632)
    );
    let samples = read_mono_16k(&fixture("speech.wav")).unwrap();
    assert_eq!(samples.len(), (33_632usize * 16_000).div_ceil(22_050));
}

#[test]
fn flac_is_lossless_so_equals_the_wav() {
    let wav = read_mono_16k(&fixture("speech.wav")).unwrap();
    let flac = read_mono_16k(&fixture("speech.flac")).unwrap();
    assert_eq!(flac, wav);
    assert_eq!(verify(&fixture("speech.flac")).unwrap().frames, 33_632);
}

#[test]
fn stereo_44k_flac_mixes_down_and_resamples_like_the_original() {
    // sox upsampled the 22.05 kHz utterance to 44.1 kHz stereo; both paths to 16 kHz must agree
    // to well within what either resampler's transition band can explain.
    let info = probe(&fixture("speech-stereo-44k.flac")).unwrap();
    assert_eq!((info.sample_rate, info.channels), (44_100, 2));
    let wav = read_mono_16k(&fixture("speech.wav")).unwrap();
    let stereo = read_mono_16k(&fixture("speech-stereo-44k.flac")).unwrap();
    assert_eq!(stereo.len(), wav.len());
    let snr = snr_db(&wav, &stereo);
    // Measured 57 dB; a fractional-sample timing error in either path drops it to ~23 dB.
    assert!(snr > 50.0, "{snr:.1} dB");
}

#[test]
fn lossy_formats_decode_close_to_the_original() {
    let wav = read_mono_16k(&fixture("speech.wav")).unwrap();
    for name in ["speech.ogg", "speech.mp3"] {
        let decoded = read_mono_16k(&fixture(name)).unwrap();
        // Encoder delay and padding are trimmed (Ogg granule positions, the LAME tag), so the
        // length is the original one and the waveforms line up.
        let difference = decoded.len().abs_diff(wav.len());
        assert!(
            difference <= 16,
            "{name}: {} vs {}",
            decoded.len(),
            wav.len()
        );
        let snr = snr_db(&wav, &decoded);
        // Measured 21 dB (Vorbis q2) and 24 dB (MP3 64 kbit/s); misaligned decoding gives < 0 dB.
        assert!(snr > 15.0, "{name}: {snr:.1} dB");
    }
}

#[test]
fn segments_from_a_compressed_file() {
    let whole = read_mono_16k(&fixture("speech.ogg")).unwrap();
    let cuts = read_segments(
        &fixture("speech.ogg"),
        &[
            Segment {
                start: 0.2,
                end: Some(0.9),
            },
            Segment {
                start: 0.5,
                end: None,
            },
        ],
    )
    .unwrap();
    let rate = SAMPLE_RATE as usize;
    assert_eq!(cuts[0], whole[rate / 5..rate * 9 / 10]);
    assert_eq!(cuts[1], whole[rate / 2..]);
}

#[test]
fn resampled_speech_matches_scipy_resample_poly() {
    let reference: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(fixture("resample_reference.json")).unwrap())
            .unwrap();
    let floats = |key: &str| -> Vec<f32> {
        reference[key]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap() as f32)
            .collect()
    };
    let ours = read_mono_16k(&fixture("speech.wav")).unwrap();
    // Same length as scipy.signal.resample_poly: ceil(n * 320 / 441).
    assert_eq!(
        ours.len() as u64,
        reference["output_length"].as_u64().unwrap()
    );
    // Sample by sample in the middle of the utterance: the two filters differ only in their
    // 7–8 kHz transition bands, where espeak-ng speech has almost no energy.
    let start = reference["excerpt_start"].as_u64().unwrap() as usize;
    let excerpt = floats("excerpt");
    let snr = snr_db(&excerpt, &ours[start..start + excerpt.len()]);
    // Measured 58 dB.
    assert!(snr > 50.0, "{snr:.1} dB against scipy.signal.resample_poly");
    // Level of every 10 ms frame with audible speech within 0.5 % (0.04 dB) of scipy's
    // (measured: at most 0.14 %).
    let frame_rms = floats("frame_rms");
    for (index, &expected) in frame_rms.iter().enumerate() {
        let frame = &ours[index * 160..(index + 1) * 160];
        let rms = (frame.iter().map(|x| x * x).sum::<f32>() / 160.0).sqrt();
        if expected > 0.01 {
            let relative = (rms - expected).abs() / expected;
            assert!(relative < 0.005, "frame {index}: {rms} vs scipy {expected}");
        }
    }
}

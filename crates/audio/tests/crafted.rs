//! Crafted and damaged headers (issue 16): each gives a clear error naming the file, or is read
//! correctly with the damaged metadata left aside, never a panic or an allocation the file
//! does not justify.

use std::path::{Path, PathBuf};

use isogloss_audio::{read_mono_16k, verify, AudioError, MAX_SAMPLE_RATE, MIN_SAMPLE_RATE};

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/fixtures/audio")
        .join(name)
}

/// A 16-bit mono PCM WAV file with the given header rate, written byte by byte so that any rate
/// can be stated (the RIFF/WAVE layout is the format's published one, common practice).
fn wav_bytes(rate: u32, samples: &[i16]) -> Vec<u8> {
    let data = (samples.len() * 2) as u32;
    let mut bytes = Vec::new();
    bytes.extend_from_slice(b"RIFF");
    bytes.extend_from_slice(&(36 + data).to_le_bytes());
    bytes.extend_from_slice(b"WAVEfmt ");
    bytes.extend_from_slice(&16u32.to_le_bytes());
    bytes.extend_from_slice(&1u16.to_le_bytes()); // PCM
    bytes.extend_from_slice(&1u16.to_le_bytes()); // mono
    bytes.extend_from_slice(&rate.to_le_bytes());
    bytes.extend_from_slice(&rate.wrapping_mul(2).to_le_bytes());
    bytes.extend_from_slice(&2u16.to_le_bytes());
    bytes.extend_from_slice(&16u16.to_le_bytes());
    bytes.extend_from_slice(b"data");
    bytes.extend_from_slice(&data.to_le_bytes());
    for sample in samples {
        bytes.extend_from_slice(&sample.to_le_bytes());
    }
    bytes
}

fn write(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

#[test]
fn sample_rates_outside_1_to_384_khz_are_refused_before_resampling() {
    // Issue 16: 2 147 483 647 Hz made the resampler allocate about 17 GB; 1 Hz turned a 3 kB
    // file into 25 M samples.
    let dir = tempfile::tempdir().unwrap();
    let tone: Vec<i16> = (0..1500).map(|i| ((i % 50) * 400) as i16).collect();
    for rate in [2_147_483_647, 1, 999, MAX_SAMPLE_RATE + 1] {
        let path = write(dir.path(), "rate.wav", &wav_bytes(rate, &tone));
        let error = read_mono_16k(&path).unwrap_err();
        assert!(matches!(error, AudioError::Unsupported { .. }), "{error}");
        let message = error.to_string();
        assert!(
            message.contains("rate.wav")
                && message.contains(&format!("{rate} Hz"))
                && message.contains("expected 1000 to 384000 Hz"),
            "{message}"
        );
    }
    for rate in [MIN_SAMPLE_RATE, MAX_SAMPLE_RATE] {
        let path = write(dir.path(), "edge.wav", &wav_bytes(rate, &tone));
        let samples = read_mono_16k(&path).unwrap();
        assert_eq!(
            samples.len() as u64,
            (1500u64 * 16_000).div_ceil(rate.into())
        );
    }
}

/// An ID3v2.4 tag whose extended header carries a restrictions byte with bit 6 set: the pinned
/// decoding library's tag parser reaches an `unreachable!()` on it (found by reading its source:
/// `(restrictions & 0x40) >> 5` can be 2).
fn crafted_id3v2_tag() -> Vec<u8> {
    let extended = [0, 0, 0, 6, 1, 0x10, 1, 0x40];
    let mut body = extended.to_vec();
    body.resize(32, 0);
    let mut tag = b"ID3\x04\x00\x40".to_vec();
    let size = body.len() as u32;
    tag.extend(
        [
            (size >> 21) & 0x7f,
            (size >> 14) & 0x7f,
            (size >> 7) & 0x7f,
            size & 0x7f,
        ]
        .map(|b| b as u8),
    );
    tag.extend(body);
    tag
}

#[test]
fn a_crafted_id3v2_tag_is_skipped_unread() {
    let dir = tempfile::tempdir().unwrap();
    let mp3 = std::fs::read(fixture("speech.mp3")).unwrap();
    let mut tagged = crafted_id3v2_tag();
    tagged.extend_from_slice(&mp3);
    let path = write(dir.path(), "tagged.mp3", &tagged);
    assert_eq!(
        read_mono_16k(&path).unwrap(),
        read_mono_16k(&fixture("speech.mp3")).unwrap()
    );
    // Behind leading junk the tag is not searched for: the file is not MPEG audio.
    let mut hidden = b"junk".to_vec();
    hidden.extend(crafted_id3v2_tag());
    hidden.extend_from_slice(&mp3);
    let path = write(dir.path(), "hidden.mp3", &hidden);
    let error = verify(&path).unwrap_err();
    assert!(matches!(error, AudioError::UnknownFormat { .. }), "{error}");
    assert!(error.to_string().contains("hidden.mp3"), "{error}");
}

/// The offset of the first metadata block of `kind` in a FLAC file (after `fLaC`).
fn flac_block(bytes: &[u8], kind: u8) -> Option<usize> {
    let mut offset = 4;
    while offset + 4 <= bytes.len() {
        let header = &bytes[offset..offset + 4];
        if header[0] & 0x7f == kind {
            return Some(offset);
        }
        let length = u32::from_be_bytes([0, header[1], header[2], header[3]]) as usize;
        if header[0] & 0x80 != 0 {
            return None;
        }
        offset += 4 + length;
    }
    None
}

#[test]
fn a_flac_comment_claiming_gigabytes_is_not_read() {
    // Found by the fuzzer: a comment length of ~4 GB in a 184-byte file was allocated before
    // reading. The block is now skipped as padding; the audio is unchanged.
    let dir = tempfile::tempdir().unwrap();
    let mut flac = std::fs::read(fixture("speech.flac")).unwrap();
    let comment = flac_block(&flac, 4).expect("the fixture has a Vorbis comment block");
    flac[comment + 4..comment + 8].copy_from_slice(&0xffff_fff0u32.to_le_bytes());
    let path = write(dir.path(), "comment.flac", &flac);
    assert_eq!(
        read_mono_16k(&path).unwrap(),
        read_mono_16k(&fixture("speech.flac")).unwrap()
    );
}

#[test]
fn an_ogg_vorbis_comment_longer_than_its_packet_is_damage() {
    let dir = tempfile::tempdir().unwrap();
    let mut ogg = std::fs::read(fixture("speech.ogg")).unwrap();
    let at = ogg
        .windows(7)
        .position(|w| w == b"\x03vorbis")
        .expect("the fixture has a comment header");
    ogg[at + 7..at + 11].copy_from_slice(&0xffff_fff0u32.to_le_bytes());
    let path = write(dir.path(), "comment.ogg", &ogg);
    let error = verify(&path).unwrap_err();
    assert!(matches!(error, AudioError::Damaged { .. }), "{error}");
    let message = error.to_string();
    assert!(
        message.contains("comment.ogg") && message.contains("vendor string"),
        "{message}"
    );
}

#[test]
fn float_samples_far_beyond_full_scale_are_refused() {
    // Found by the fuzzer: finite values near 1e38 overflowed the resampler's FFT.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("loud.wav");
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: 22_050,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut writer = hound::WavWriter::create(&path, spec).unwrap();
    for i in 0..4000 {
        writer
            .write_sample(if i == 3000 { 1e30f32 } else { 0.25 })
            .unwrap();
    }
    writer.finalize().unwrap();
    let error = read_mono_16k(&path).unwrap_err();
    assert!(
        matches!(error, AudioError::OutOfRange { frame: 3000, .. }),
        "{error}"
    );
    assert!(error.to_string().contains("loud.wav"));
}

/// Issue 16: a panic inside one file's audio work is that file's error, naming it and the
/// panic's message; the caller (a batch) goes on.
#[test]
fn a_panic_in_one_files_work_is_that_files_error() {
    let path = Path::new("interviews/int7.flac");
    let result: Result<(), AudioError> = isogloss_audio::isolated(path, || {
        panic!("index out of bounds in a crafted block");
    });
    let message = result.unwrap_err().to_string();
    assert_eq!(
        message,
        "interviews/int7.flac: the audio data is damaged: the decoder failed inside (index out of bounds in a crafted block)"
    );
    let fine = isogloss_audio::isolated(path, || Ok(3));
    assert_eq!(fine.unwrap(), 3);
}

//! Audio input for isogloss: decoding WAV, FLAC, MP3 and Ogg Vorbis, averaging channels to mono,
//! resampling to 16 kHz, cutting utterance segments out of long recordings, and the waveform
//! augmentations used in training (speed and volume perturbation here; noise, reverberation,
//! band-limiting and gain in [`augment`]).
//!
//! # Design
//!
//! Everything goes through **one streaming pipeline**: a decoder hands out short blocks of mono
//! samples at the file's own rate, a band-limited resampler turns them into 16 kHz, and the
//! consumer takes what it needs. Reading a whole file ([`read_mono_16k`]), cutting many segments
//! ([`read_segments`]) and walking a multi-hour archive recording in bounded memory
//! ([`ChunkReader`]) are three consumers of that one stream, so they give bit-identical samples
//! and a segment list never decodes a long file more than once.
//!
//! WAV is read with `hound` (8/16/24/32-bit integer and 32-bit float PCM); compressed formats
//! with the pure-Rust `symphonia` decoders. Integer samples are scaled by 1/2^(bits−1), so 16-bit
//! audio is divided by 32768 as `docs/features.md` specifies. Resampling uses `rubato`'s
//! synchronous FFT resampler: an exact rational ratio with a long windowed-sinc anti-aliasing
//! filter, fast enough for hours of audio on one core.
//!
//! # Example
//!
//! ```no_run
//! use isogloss_audio::{read_segments, Segment, SAMPLE_RATE};
//!
//! # fn main() -> Result<(), isogloss_audio::AudioError> {
//! let segments = [
//!     Segment { start: 0.5, end: Some(2.0) },
//!     Segment { start: 61.0, end: Some(64.5) },
//! ];
//! let cuts = read_segments("interview.flac".as_ref(), &segments)?;
//! assert_eq!(cuts[0].len(), (1.5 * SAMPLE_RATE as f64) as usize);
//! # Ok(())
//! # }
//! ```
#![deny(missing_docs)]

use std::path::{Path, PathBuf};

pub mod augment;
mod decode;
mod perturb;
mod resample;
mod stream;

pub use perturb::{check_speed_factor, speed_perturb, volume_perturb};
pub use stream::ChunkReader;

/// The sample rate every isogloss stage after decoding works at (Hz).
pub const SAMPLE_RATE: u32 = 16_000;

/// How far (seconds) a segment's end may lie past the end of the audio before it is an error:
/// one 10 ms feature frame, because transcribers round times and encoders pad the last block.
/// Ends within this margin are clipped to the audio.
pub const END_TOLERANCE_SECONDS: f64 = 0.01;

/// Everything that can go wrong reading audio. Every message names the file.
#[derive(Debug, thiserror::Error)]
pub enum AudioError {
    /// The file could not be opened or read.
    #[error("{path}: cannot read the audio file: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        source: std::io::Error,
    },
    /// The bytes are not a container format we can read.
    #[error("{path}: not a readable audio file (expected WAV, FLAC, MP3 or Ogg Vorbis): {detail}")]
    UnknownFormat {
        /// The file.
        path: PathBuf,
        /// What the decoder found instead.
        detail: String,
    },
    /// The container was recognised but its content is broken (e.g. truncated).
    #[error("{path}: the audio data is damaged: {detail}")]
    Damaged {
        /// The file.
        path: PathBuf,
        /// Where and what.
        detail: String,
    },
    /// A recognised format with a variant we do not read (e.g. 64-bit float WAV).
    #[error("{path}: unsupported audio encoding: {detail}")]
    Unsupported {
        /// The file.
        path: PathBuf,
        /// Which feature.
        detail: String,
    },
    /// The file decodes but holds no samples.
    #[error("{path}: contains no audio samples (zero-length audio)")]
    Empty {
        /// The file.
        path: PathBuf,
    },
    /// A floating-point sample is NaN or infinite.
    #[error("{path}: sample {frame} (at {seconds:.3} s) is not a finite number (NaN or infinity)")]
    NotFinite {
        /// The file.
        path: PathBuf,
        /// 0-based frame index at the file's own sample rate.
        frame: u64,
        /// The same position in seconds.
        seconds: f64,
    },
    /// A requested segment does not fit the file.
    #[error("{path}: segment {index} ({start} s to {end}): {problem}")]
    BadSegment {
        /// The file.
        path: PathBuf,
        /// 0-based position of the segment in the request.
        index: usize,
        /// Requested start (seconds).
        start: f64,
        /// Requested end, as written (seconds or "end of file").
        end: String,
        /// What is wrong with it.
        problem: String,
    },
    /// A parameter outside its valid range (e.g. a speed factor of zero).
    #[error("invalid {what}: expected {expected}, found {found}")]
    InvalidParameter {
        /// Which parameter.
        what: &'static str,
        /// The valid range.
        expected: &'static str,
        /// The value given.
        found: String,
    },
    /// An augmentation setting out of range, named by its key in the training configuration.
    #[error("{key}: expected {expected}, found {found}")]
    InvalidSetting {
        /// The key, e.g. `augmentation.noise.snr_db`.
        key: &'static str,
        /// What a valid value looks like.
        expected: String,
        /// The value given.
        found: String,
    },
    /// Babble noise was drawn but the caller supplied no utterances to make it from.
    #[error("augmentation.noise.kinds lists \"babble\", but no utterances were supplied to make babble from")]
    NoBabbleSource,
}

/// What a file holds, as read from its header (or counted by decoding when the header is silent).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AudioInfo {
    /// The file's own sample rate (Hz).
    pub sample_rate: u32,
    /// Number of interleaved channels.
    pub channels: u16,
    /// Frames (samples per channel).
    pub frames: u64,
    /// `frames / sample_rate`.
    pub duration_seconds: f64,
}

/// A stretch of a recording in seconds; `end: None` means "to the end of the file".
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Segment {
    /// Start time (seconds, ≥ 0).
    pub start: f64,
    /// End time (seconds, > start), or the end of the file.
    pub end: Option<f64>,
}

/// Reads the header of an audio file: rate, channels, length. Formats whose header does not state
/// the length (some MP3s) are decoded once to count frames. Zero-length audio is an error.
pub fn probe(path: &Path) -> Result<AudioInfo, AudioError> {
    let source = decode::open(path)?;
    let info = match source.info() {
        Some(info) => info,
        None => decode::count_frames(source)?,
    };
    if info.frames == 0 {
        return Err(AudioError::Empty {
            path: path.to_path_buf(),
        });
    }
    Ok(info)
}

/// Decodes the whole file without resampling and returns what was actually found (header lengths
/// can lie: a truncated file is reported as damaged). For validating corpora: every sample is
/// checked, nothing is kept.
pub fn verify(path: &Path) -> Result<AudioInfo, AudioError> {
    let info = decode::count_frames(decode::open(path)?)?;
    if info.frames == 0 {
        return Err(AudioError::Empty {
            path: path.to_path_buf(),
        });
    }
    Ok(info)
}

/// Reads a whole file as 16 kHz mono (channels averaged, resampled when needed).
pub fn read_mono_16k(path: &Path) -> Result<Vec<f32>, AudioError> {
    let mut reader = ChunkReader::open(path, 1 << 16)?;
    let mut samples = Vec::new();
    while let Some(chunk) = reader.next_chunk()? {
        samples.extend_from_slice(&chunk);
    }
    if samples.is_empty() {
        return Err(AudioError::Empty {
            path: path.to_path_buf(),
        });
    }
    Ok(samples)
}

/// Cuts several segments out of one file in a single decoding pass, as 16 kHz mono. The result
/// is in the order of `segments` (which may overlap and come in any order); each cut is exactly
/// the samples `read_mono_16k` would give between `round(start·16000)` and `round(end·16000)`.
/// Decoding stops after the last sample any segment needs.
pub fn read_segments(path: &Path, segments: &[Segment]) -> Result<Vec<Vec<f32>>, AudioError> {
    let bad = |index: usize, segment: &Segment, problem: String| AudioError::BadSegment {
        path: path.to_path_buf(),
        index,
        start: segment.start,
        end: segment
            .end
            .map_or_else(|| "end of file".to_string(), |end| format!("{end} s")),
        problem,
    };
    // Sample ranges at 16 kHz; `u64::MAX` stands for "to the end of the file".
    let mut ranges = Vec::with_capacity(segments.len());
    for (index, segment) in segments.iter().enumerate() {
        if !segment.start.is_finite() || segment.start < 0.0 {
            return Err(bad(
                index,
                segment,
                "expected a start time of 0 s or later".into(),
            ));
        }
        let end = match segment.end {
            Some(end) if !end.is_finite() || end <= segment.start => {
                return Err(bad(
                    index,
                    segment,
                    "expected the end to come after the start".into(),
                ))
            }
            Some(end) => seconds_to_samples(end),
            None => u64::MAX,
        };
        ranges.push((seconds_to_samples(segment.start), end));
    }
    let last_needed = ranges.iter().map(|&(_, end)| end).max().unwrap_or(0);
    let mut cuts: Vec<Vec<f32>> = ranges
        .iter()
        .map(|&(start, end)| match end {
            // Open-ended: the length is unknown until the stream ends.
            u64::MAX => Vec::new(),
            end => Vec::with_capacity(end.saturating_sub(start).min(1 << 24) as usize),
        })
        .collect();
    let mut reader = ChunkReader::open(path, 1 << 15)?;
    let mut offset = 0u64;
    while offset < last_needed {
        let Some(chunk) = reader.next_chunk()? else {
            break;
        };
        let chunk_end = offset + chunk.len() as u64;
        for (cut, &(start, end)) in cuts.iter_mut().zip(&ranges) {
            let from = start.max(offset);
            let to = end.min(chunk_end);
            if from < to {
                cut.extend_from_slice(&chunk[(from - offset) as usize..(to - offset) as usize]);
            }
        }
        offset = chunk_end;
    }
    let total = offset;
    let tolerance = seconds_to_samples(END_TOLERANCE_SECONDS);
    for (index, (segment, &(start, end))) in segments.iter().zip(&ranges).enumerate() {
        let past_end = if end == u64::MAX {
            start >= total
        } else {
            end > total + tolerance || start >= total
        };
        if past_end {
            return Err(bad(
                index,
                segment,
                format!(
                    "expected the segment inside the audio, which lasts {:.3} s",
                    total as f64 / f64::from(SAMPLE_RATE)
                ),
            ));
        }
    }
    Ok(cuts)
}

/// Nearest 16 kHz sample index of a time in seconds.
fn seconds_to_samples(seconds: f64) -> u64 {
    (seconds * f64::from(SAMPLE_RATE)).round() as u64
}

#[cfg(test)]
pub(crate) mod test_support {
    //! WAV fixtures written on the fly and a tone analyser shared by the unit tests.

    use std::f64::consts::PI;
    use std::path::{Path, PathBuf};

    /// A sine of `frequency` Hz and peak `amplitude` lasting `seconds`, at `rate`.
    pub fn sine(rate: u32, frequency: f64, amplitude: f64, seconds: f64) -> Vec<f64> {
        let n = (seconds * f64::from(rate)).round() as usize;
        (0..n)
            .map(|i| amplitude * (2.0 * PI * frequency * i as f64 / f64::from(rate)).sin())
            .collect()
    }

    /// Writes `samples` (one channel, values in [-1, 1)) as a 16-bit WAV with `channels`
    /// identical channels.
    pub fn write_wav_i16(path: &Path, rate: u32, channels: u16, samples: &[f64]) {
        let spec = hound::WavSpec {
            channels,
            sample_rate: rate,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut writer = hound::WavWriter::create(path, spec).unwrap();
        for &s in samples {
            for _ in 0..channels {
                writer.write_sample((s * 32768.0).round() as i16).unwrap();
            }
        }
        writer.finalize().unwrap();
    }

    /// Writes a 32-bit float mono WAV.
    pub fn write_wav_f32(path: &Path, rate: u32, samples: &[f32]) {
        let spec = hound::WavSpec {
            channels: 1,
            sample_rate: rate,
            bits_per_sample: 32,
            sample_format: hound::SampleFormat::Float,
        };
        let mut writer = hound::WavWriter::create(path, spec).unwrap();
        for &s in samples {
            writer.write_sample(s).unwrap();
        }
        writer.finalize().unwrap();
    }

    /// A temporary folder and a path inside it.
    pub fn temp_path(name: &str) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join(name);
        (dir, path)
    }

    /// Amplitude and phase-free level of the `frequency` component, by least-squares projection
    /// on sin and cos over `samples` (whole periods not required: the edges are trimmed by the
    /// caller and the projection window is long).
    pub fn tone_amplitude(samples: &[f32], rate: u32, frequency: f64) -> f64 {
        let (mut s, mut c) = (0.0f64, 0.0f64);
        for (i, &x) in samples.iter().enumerate() {
            let phase = 2.0 * PI * frequency * i as f64 / f64::from(rate);
            s += f64::from(x) * phase.sin();
            c += f64::from(x) * phase.cos();
        }
        2.0 * (s * s + c * c).sqrt() / samples.len() as f64
    }

    /// Root mean square.
    pub fn rms(samples: &[f32]) -> f64 {
        (samples.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>() / samples.len() as f64).sqrt()
    }
}

#[cfg(test)]
mod tests {
    use super::test_support::*;
    use super::*;

    #[test]
    fn segments_equal_slices_of_the_whole_file() {
        let (_dir, path) = temp_path("long.wav");
        let samples = sine(44_100, 440.0, 0.5, 3.0);
        write_wav_i16(&path, 44_100, 2, &samples);
        let whole = read_mono_16k(&path).unwrap();
        assert_eq!(whole.len(), 48_000);
        let segments = [
            Segment {
                start: 2.0,
                end: None,
            },
            Segment {
                start: 0.25,
                end: Some(1.5),
            },
            Segment {
                start: 1.0,
                end: Some(2.004),
            },
        ];
        let cuts = read_segments(&path, &segments).unwrap();
        assert_eq!(cuts[0], whole[32_000..]);
        assert_eq!(cuts[1], whole[4_000..24_000]);
        assert_eq!(cuts[2], whole[16_000..32_064]);
    }

    #[test]
    fn segment_past_the_end_is_an_error_naming_file_and_segment() {
        let (_dir, path) = temp_path("short.wav");
        write_wav_i16(&path, 16_000, 1, &sine(16_000, 440.0, 0.5, 1.0));
        // Within one frame of the end: clipped, not an error.
        let cuts = read_segments(
            &path,
            &[Segment {
                start: 0.5,
                end: Some(1.005),
            }],
        )
        .unwrap();
        assert_eq!(cuts[0].len(), 8_000);
        let error = read_segments(
            &path,
            &[
                Segment {
                    start: 0.0,
                    end: Some(0.5),
                },
                Segment {
                    start: 0.5,
                    end: Some(3.0),
                },
            ],
        )
        .unwrap_err()
        .to_string();
        assert!(
            error.contains("short.wav") && error.contains("segment 1") && error.contains("1.000 s"),
            "{error}"
        );
        let error = read_segments(
            &path,
            &[Segment {
                start: 0.7,
                end: Some(0.2),
            }],
        )
        .unwrap_err()
        .to_string();
        assert!(error.contains("end to come after the start"), "{error}");
    }

    #[test]
    fn probe_reads_the_header() {
        let (_dir, path) = temp_path("stereo.wav");
        write_wav_i16(&path, 22_050, 2, &sine(22_050, 440.0, 0.5, 0.5));
        let info = probe(&path).unwrap();
        assert_eq!(
            info,
            AudioInfo {
                sample_rate: 22_050,
                channels: 2,
                frames: 11_025,
                duration_seconds: 0.5
            }
        );
        assert_eq!(verify(&path).unwrap(), info);
    }
}

//! Decoders behind one reader: a [`Source`] hands out blocks of mono samples at the file's own
//! rate, whatever the container. WAV goes through `hound`; everything else (and WAV variants
//! `hound` does not read, such as 64-bit float) through `symphonia`.

use std::fs::File;
use std::io::{BufReader, ErrorKind, Read};
use std::path::{Path, PathBuf};

use symphonia::core::audio::SampleBuffer;
use symphonia::core::codecs::{Decoder, DecoderOptions, CODEC_TYPE_NULL, CODEC_TYPE_VORBIS};
use symphonia::core::errors::Error as SymphoniaError;
use symphonia::core::formats::{FormatOptions, FormatReader};
use symphonia::core::io::MediaSourceStream;
use symphonia::core::meta::MetadataOptions;
use symphonia::core::probe::Hint;

use crate::{AudioError, AudioInfo};

/// Frames per block when reading WAV (compressed formats give one packet per block).
const WAV_BLOCK_FRAMES: usize = 4096;

/// An open audio file delivering mono blocks at its own sample rate.
pub(crate) struct Source {
    path: PathBuf,
    sample_rate: u32,
    channels: u16,
    /// The length the header announces, when it does.
    header_frames: Option<u64>,
    /// Frames delivered so far (for error positions and truncation checks).
    frames_read: u64,
    inner: Inner,
}

enum Inner {
    Wav {
        reader: hound::WavReader<BufReader<File>>,
        format: hound::SampleFormat,
        bits: u16,
    },
    Compressed {
        format: Box<dyn FormatReader>,
        decoder: Box<dyn Decoder>,
        track_id: u32,
        buffer: Option<SampleBuffer<f32>>,
        /// Frames the stream holds by its container, where that count is exact and the decoder
        /// may deliver more: Ogg Vorbis, whose last page's granule position is the exact length
        /// while the last decoded block can run past it (the Vorbis I specification, appendix
        /// A.2, cited from memory: a final granule position below the decoded total trims the
        /// end of the last packet).
        exact_length: Option<u64>,
    },
}

/// Opens `path`, choosing the decoder from the file's first bytes (not its name: a text file
/// called `.wav` must be reported as what it is).
pub(crate) fn open(path: &Path) -> Result<Source, AudioError> {
    let io = |source| AudioError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut magic = [0u8; 12];
    let mut file = File::open(path).map_err(io)?;
    let found = read_up_to(&mut file, &mut magic).map_err(io)?;
    if found == 0 {
        return Err(AudioError::Empty {
            path: path.to_path_buf(),
        });
    }
    if found == 12 && &magic[0..4] == b"RIFF" && &magic[8..12] == b"WAVE" {
        match open_wav(path) {
            Err(WavOpen::TryOther) => {}
            Err(WavOpen::Failed(error)) => return Err(error),
            Ok(source) => return Ok(source),
        }
    }
    open_compressed(path)
}

fn read_up_to(file: &mut File, buffer: &mut [u8]) -> std::io::Result<usize> {
    let mut filled = 0;
    while filled < buffer.len() {
        match file.read(&mut buffer[filled..])? {
            0 => break,
            n => filled += n,
        }
    }
    Ok(filled)
}

enum WavOpen {
    /// A WAV variant hound does not read; symphonia may.
    TryOther,
    Failed(AudioError),
}

fn open_wav(path: &Path) -> Result<Source, WavOpen> {
    let reader = hound::WavReader::open(path).map_err(|error| match error {
        hound::Error::Unsupported | hound::Error::TooWide | hound::Error::InvalidSampleFormat => {
            WavOpen::TryOther
        }
        hound::Error::IoError(source) if source.kind() == ErrorKind::UnexpectedEof => {
            WavOpen::Failed(AudioError::Damaged {
                path: path.to_path_buf(),
                detail: "the WAV header is cut short".into(),
            })
        }
        hound::Error::IoError(source) => WavOpen::Failed(AudioError::Io {
            path: path.to_path_buf(),
            source,
        }),
        other => WavOpen::Failed(AudioError::Damaged {
            path: path.to_path_buf(),
            detail: format!("invalid WAV header: {other}"),
        }),
    })?;
    let spec = reader.spec();
    let usable = match spec.sample_format {
        hound::SampleFormat::Int => (8..=32).contains(&spec.bits_per_sample),
        hound::SampleFormat::Float => spec.bits_per_sample == 32,
    };
    if !usable || spec.channels == 0 || spec.sample_rate == 0 {
        return Err(WavOpen::TryOther);
    }
    Ok(Source {
        path: path.to_path_buf(),
        sample_rate: spec.sample_rate,
        channels: spec.channels,
        header_frames: Some(u64::from(reader.duration())),
        frames_read: 0,
        inner: Inner::Wav {
            format: spec.sample_format,
            bits: spec.bits_per_sample,
            reader,
        },
    })
}

fn open_compressed(path: &Path) -> Result<Source, AudioError> {
    let file = File::open(path).map_err(|source| AudioError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let stream = MediaSourceStream::new(Box::new(file), Default::default());
    let mut hint = Hint::new();
    if let Some(extension) = path.extension().and_then(|e| e.to_str()) {
        hint.with_extension(extension);
    }
    let options = FormatOptions {
        // Trim encoder delay and padding so that lengths match the original recording.
        enable_gapless: true,
        ..Default::default()
    };
    let probed = symphonia::default::get_probe()
        .format(&hint, stream, &options, &MetadataOptions::default())
        .map_err(|error| AudioError::UnknownFormat {
            path: path.to_path_buf(),
            detail: error.to_string(),
        })?;
    let format = probed.format;
    let track = format
        .tracks()
        .iter()
        .find(|t| t.codec_params.codec != CODEC_TYPE_NULL)
        .ok_or_else(|| AudioError::Empty {
            path: path.to_path_buf(),
        })?;
    let params = track.codec_params.clone();
    let track_id = track.id;
    let unsupported = |detail: String| AudioError::Unsupported {
        path: path.to_path_buf(),
        detail,
    };
    let sample_rate = params
        .sample_rate
        .filter(|&r| r > 0)
        .ok_or_else(|| unsupported("the stream does not state its sample rate".into()))?;
    let decoder = symphonia::default::get_codecs()
        .make(&params, &DecoderOptions::default())
        .map_err(|error| unsupported(error.to_string()))?;
    let channels = params.channels.map_or(0, |c| c.count() as u16);
    Ok(Source {
        path: path.to_path_buf(),
        sample_rate,
        channels,
        header_frames: params.n_frames,
        frames_read: 0,
        inner: Inner::Compressed {
            format,
            decoder,
            track_id,
            buffer: None,
            exact_length: params
                .n_frames
                .filter(|_| params.codec == CODEC_TYPE_VORBIS),
        },
    })
}

impl Source {
    /// The file's own sample rate.
    pub(crate) fn sample_rate(&self) -> u32 {
        self.sample_rate
    }

    /// The file's path (for messages).
    pub(crate) fn path(&self) -> &Path {
        &self.path
    }

    /// What the header says, when it states the length.
    pub(crate) fn info(&self) -> Option<AudioInfo> {
        self.header_frames.map(|frames| self.info_with(frames))
    }

    fn info_with(&self, frames: u64) -> AudioInfo {
        AudioInfo {
            sample_rate: self.sample_rate,
            channels: self.channels,
            frames,
            duration_seconds: frames as f64 / f64::from(self.sample_rate),
        }
    }

    /// Appends the next block of mono samples (channels averaged) to `out`. Returns `false`
    /// when the stream has ended and nothing was appended.
    pub(crate) fn read_block(&mut self, out: &mut Vec<f32>) -> Result<bool, AudioError> {
        let before = out.len();
        match &mut self.inner {
            Inner::Wav {
                reader,
                format,
                bits,
            } => {
                let channels = usize::from(self.channels);
                let announced = self.header_frames.unwrap_or(0);
                let truncated = |frames_read: u64| {
                    AudioError::Damaged {
                    path: self.path.clone(),
                    detail: format!(
                        "the file ends after {frames_read} of the {announced} frames its header announces (truncated?)"
                    ),
                }
                };
                match format {
                    hound::SampleFormat::Int => {
                        // Integer PCM with b bits is scaled by 1/2^(b-1): 16-bit by 1/32768.
                        let scale = 1.0 / (1u64 << (*bits - 1)) as f32;
                        let mut samples = reader.samples::<i32>();
                        'frames: for frame in 0..WAV_BLOCK_FRAMES {
                            let mut sum = 0.0f32;
                            for channel in 0..channels {
                                match samples.next() {
                                    None if channel == 0 => break 'frames,
                                    None => return Err(truncated(self.frames_read + frame as u64)),
                                    Some(Err(_)) => {
                                        return Err(truncated(self.frames_read + frame as u64))
                                    }
                                    Some(Ok(value)) => sum += value as f32 * scale,
                                }
                            }
                            out.push(sum / channels as f32);
                        }
                    }
                    hound::SampleFormat::Float => {
                        let mut samples = reader.samples::<f32>();
                        'frames: for frame in 0..WAV_BLOCK_FRAMES {
                            let mut sum = 0.0f32;
                            for channel in 0..channels {
                                match samples.next() {
                                    None if channel == 0 => break 'frames,
                                    None | Some(Err(_)) => {
                                        return Err(truncated(self.frames_read + frame as u64))
                                    }
                                    Some(Ok(value)) => sum += value,
                                }
                            }
                            out.push(sum / channels as f32);
                        }
                    }
                }
            }
            Inner::Compressed {
                format,
                decoder,
                track_id,
                buffer,
                exact_length,
            } => loop {
                let packet = match format.next_packet() {
                    Ok(packet) => packet,
                    Err(SymphoniaError::IoError(error))
                        if error.kind() == ErrorKind::UnexpectedEof =>
                    {
                        break
                    }
                    // A chained stream starts over with new parameters; we read the first one.
                    Err(SymphoniaError::ResetRequired) => break,
                    Err(error) => {
                        return Err(AudioError::Damaged {
                            path: self.path.clone(),
                            detail: format!(
                                "after {} frames: {error}",
                                self.frames_read + (out.len() - before) as u64
                            ),
                        })
                    }
                };
                if packet.track_id() != *track_id {
                    continue;
                }
                let decoded = match decoder.decode(&packet) {
                    Ok(decoded) => decoded,
                    // One corrupt packet is skipped, as players do; the rest still decodes.
                    Err(SymphoniaError::DecodeError(_)) => continue,
                    Err(SymphoniaError::IoError(error))
                        if error.kind() == ErrorKind::UnexpectedEof =>
                    {
                        break
                    }
                    Err(error) => {
                        return Err(AudioError::Damaged {
                            path: self.path.clone(),
                            detail: format!("after {} frames: {error}", self.frames_read),
                        })
                    }
                };
                if decoded.frames() == 0 {
                    continue;
                }
                let spec = *decoded.spec();
                let channels = spec.channels.count().max(1);
                let needed = decoded.capacity() * channels;
                let buffer = match buffer {
                    Some(existing) if existing.capacity() >= needed => existing,
                    _ => buffer.insert(SampleBuffer::new(decoded.capacity() as u64, spec)),
                };
                buffer.copy_interleaved_ref(decoded);
                for frame in buffer.samples().chunks_exact(channels) {
                    out.push(frame.iter().sum::<f32>() / channels as f32);
                }
                if let Some(length) = *exact_length {
                    let room = length.saturating_sub(self.frames_read) as usize;
                    out.truncate(before + room.min(out.len() - before));
                }
                if self.channels == 0 {
                    self.channels = channels as u16;
                }
                break;
            },
        }
        // Non-finite samples would poison every later stage (features, CMVN, training).
        if let Some(position) = out[before..].iter().position(|x| !x.is_finite()) {
            let frame = self.frames_read + position as u64;
            return Err(AudioError::NotFinite {
                path: self.path.clone(),
                frame,
                seconds: frame as f64 / f64::from(self.sample_rate),
            });
        }
        self.frames_read += (out.len() - before) as u64;
        Ok(out.len() > before)
    }
}

/// Decodes the rest of `source`, keeping nothing, and returns what was really there.
pub(crate) fn count_frames(mut source: Source) -> Result<AudioInfo, AudioError> {
    let mut scratch = Vec::with_capacity(WAV_BLOCK_FRAMES);
    while source.read_block(&mut scratch)? {
        scratch.clear();
    }
    Ok(source.info_with(source.frames_read))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::*;
    use crate::{probe, read_mono_16k, verify};

    fn write_int_wav(path: &Path, bits: u16, values: &[i32]) {
        let spec = hound::WavSpec {
            channels: 1,
            sample_rate: 16_000,
            bits_per_sample: bits,
            sample_format: hound::SampleFormat::Int,
        };
        let mut writer = hound::WavWriter::create(path, spec).unwrap();
        for &v in values {
            match bits {
                8 => writer.write_sample(v as i8).unwrap(),
                16 => writer.write_sample(v as i16).unwrap(),
                _ => writer.write_sample(v).unwrap(),
            }
        }
        writer.finalize().unwrap();
    }

    #[test]
    fn integer_pcm_is_scaled_by_two_to_the_bits_minus_one() {
        for bits in [8u16, 16, 24, 32] {
            let (_dir, path) = temp_path("int.wav");
            let full = 1i64 << (bits - 1);
            let values = [
                0i32,
                (full / 2) as i32,
                (-full) as i32,
                (full - 1) as i32,
                (-full / 4) as i32,
            ];
            write_int_wav(&path, bits, &values);
            let samples = read_mono_16k(&path).unwrap();
            // 16 kHz input is passed through untouched, so the scaling is seen exactly.
            let expected = [0.0, 0.5, -1.0, (full - 1) as f32 / full as f32, -0.25];
            assert_eq!(samples, expected, "{bits}-bit");
        }
        // docs/features.md: int16 value 16384 is 16384/32768 = 0.5 exactly.
    }

    #[test]
    fn channels_are_averaged() {
        let (_dir, path) = temp_path("stereo.wav");
        let spec = hound::WavSpec {
            channels: 2,
            sample_rate: 16_000,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut writer = hound::WavWriter::create(&path, spec).unwrap();
        for (left, right) in [(16_384i16, 0i16), (-32_768, 16_384), (8_192, 8_192)] {
            writer.write_sample(left).unwrap();
            writer.write_sample(right).unwrap();
        }
        writer.finalize().unwrap();
        assert_eq!(read_mono_16k(&path).unwrap(), [0.25, -0.25, 0.25]);
    }

    #[test]
    fn float_wav_is_read_as_is() {
        let (_dir, path) = temp_path("float.wav");
        write_wav_f32(&path, 16_000, &[0.125, -0.75, 1.5]);
        assert_eq!(read_mono_16k(&path).unwrap(), [0.125, -0.75, 1.5]);
    }

    #[test]
    fn nan_in_float_wav_is_an_error_with_its_position() {
        let (_dir, path) = temp_path("nan.wav");
        let mut samples = vec![0.1f32; 20_000];
        samples[16_800] = f32::NAN;
        write_wav_f32(&path, 16_000, &samples);
        let error = read_mono_16k(&path).unwrap_err();
        assert!(matches!(error, AudioError::NotFinite { frame: 16_800, .. }));
        let message = error.to_string();
        assert!(
            message.contains("nan.wav") && message.contains("1.050 s"),
            "{message}"
        );
        assert!(matches!(
            verify(&path),
            Err(AudioError::NotFinite { frame: 16_800, .. })
        ));
    }

    #[test]
    fn truncated_wav_is_damaged_not_a_panic() {
        let (_dir, path) = temp_path("cut.wav");
        write_wav_i16(&path, 16_000, 1, &sine(16_000, 440.0, 0.5, 1.0));
        let bytes = std::fs::read(&path).unwrap();
        std::fs::write(&path, &bytes[..bytes.len() / 2]).unwrap();
        let message = read_mono_16k(&path).unwrap_err().to_string();
        assert!(
            message.contains("cut.wav") && message.contains("truncated"),
            "{message}"
        );
        // The header still announces the full length; only decoding finds the cut.
        assert_eq!(probe(&path).unwrap().frames, 16_000);
        assert!(matches!(verify(&path), Err(AudioError::Damaged { .. })));
        // Cut inside the header.
        std::fs::write(&path, &bytes[..30]).unwrap();
        let message = read_mono_16k(&path).unwrap_err().to_string();
        assert!(message.contains("cut.wav"), "{message}");
    }

    #[test]
    fn zero_length_audio_is_an_error() {
        let (_dir, path) = temp_path("empty.wav");
        write_wav_i16(&path, 16_000, 1, &[]);
        for error in [
            read_mono_16k(&path).unwrap_err(),
            probe(&path).unwrap_err(),
            verify(&path).unwrap_err(),
        ] {
            assert!(matches!(error, AudioError::Empty { .. }), "{error}");
            assert!(error.to_string().contains("empty.wav"));
        }
        std::fs::write(&path, b"").unwrap();
        assert!(matches!(
            read_mono_16k(&path),
            Err(AudioError::Empty { .. })
        ));
    }

    #[test]
    fn text_file_named_wav_is_not_audio() {
        let (_dir, path) = temp_path("notes.wav");
        std::fs::write(&path, "speaker A said hello\n".repeat(50)).unwrap();
        let error = read_mono_16k(&path).unwrap_err();
        assert!(matches!(error, AudioError::UnknownFormat { .. }), "{error}");
        let message = error.to_string();
        assert!(
            message.contains("notes.wav") && message.contains("not a readable audio file"),
            "{message}"
        );
    }

    #[test]
    fn missing_file_names_the_file() {
        let message = read_mono_16k(Path::new("/nonexistent/interview-07.flac"))
            .unwrap_err()
            .to_string();
        assert!(message.contains("interview-07.flac"), "{message}");
    }
}

//! The recording beside the pages: which files a browser plays, and a converted copy for the
//! ones it does not.
//!
//! Browsers play WAV with integer PCM (8–32 bit) or 32-bit float samples, FLAC, MP3, and Ogg
//! with Vorbis or Opus (common practice of current browsers, from memory, not a standard).
//! Anything else that isogloss reads — for example WAV with 64-bit float samples or another
//! codec — gets a 16-bit 16 kHz mono WAV copy written by the tool, which every browser plays.
//! The page also reacts at run time: when the browser refuses the original after all, it says
//! so and switches to the copy if there is one.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use isogloss_audio::ChunkReader;

use crate::ReviewError;

/// Whether a browser can be expected to play a file, judged from its first bytes.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Playability {
    /// A container and codec browsers play.
    Plays,
    /// Not expected to play; the reason names what was found.
    Unlikely(String),
}

/// Looks at the first 4 kB of `path`.
pub fn playability(path: &Path) -> Result<Playability, ReviewError> {
    let mut head = Vec::with_capacity(4096);
    File::open(path)
        .and_then(|f| f.take(4096).read_to_end(&mut head))
        .map_err(|source| ReviewError::Io {
            path: path.to_path_buf(),
            source,
        })?;
    Ok(judge(&head))
}

fn judge(head: &[u8]) -> Playability {
    use Playability::*;
    if head.len() >= 12 && &head[0..4] == b"RIFF" && &head[8..12] == b"WAVE" {
        return wav(head);
    }
    if head.starts_with(b"fLaC") {
        return Plays;
    }
    if head.starts_with(b"OggS") {
        let has = |needle: &[u8]| head.windows(needle.len()).any(|w| w == needle);
        return if has(b"\x01vorbis") || has(b"OpusHead") {
            Plays
        } else {
            Unlikely("Ogg with a codec other than Vorbis or Opus".into())
        };
    }
    if head.starts_with(b"ID3") || (head.len() >= 2 && head[0] == 0xFF && head[1] & 0xE0 == 0xE0) {
        return Plays;
    }
    Unlikely("a container browsers do not play".into())
}

/// WAV: walk the chunks to `fmt ` and read the sample format and width.
fn wav(head: &[u8]) -> Playability {
    let mut at = 12;
    while at + 8 <= head.len() {
        let id = &head[at..at + 4];
        let size = u32::from_le_bytes([head[at + 4], head[at + 5], head[at + 6], head[at + 7]]);
        if id == b"fmt " && at + 24 <= head.len() {
            let u16_at = |i: usize| u16::from_le_bytes([head[i], head[i + 1]]);
            let mut code = u16_at(at + 8);
            let bits = u16_at(at + 22);
            // WAVE_FORMAT_EXTENSIBLE: the real code opens the sub-format GUID
            if code == 0xFFFE && at + 34 <= head.len() {
                code = u16_at(at + 32);
            }
            return match (code, bits) {
                (1, 8 | 16 | 24 | 32) | (3, 32) => Playability::Plays,
                (3, bits) => Playability::Unlikely(format!("WAV with {bits}-bit float samples")),
                (code, bits) => {
                    Playability::Unlikely(format!("WAV with format code {code}, {bits} bits"))
                }
            };
        }
        at += 8 + size as usize + (size as usize & 1);
    }
    Playability::Unlikely("WAV whose format chunk is not in its first 4 kB".into())
}

/// Writes `source` as 16-bit PCM WAV, 16 kHz mono, streaming (memory does not grow with the
/// recording's length).
pub fn write_converted(source: &Path, target: &Path) -> Result<(), ReviewError> {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: isogloss_audio::SAMPLE_RATE,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let failed = |error: hound::Error| ReviewError::Write {
        path: target.to_path_buf(),
        problem: error.to_string(),
    };
    let mut reader = ChunkReader::open(source, 1 << 16)?;
    let mut writer = hound::WavWriter::create(target, spec).map_err(failed)?;
    while let Some(chunk) = reader.next_chunk()? {
        for x in chunk {
            let sample = (x * 32768.0).round().clamp(-32768.0, 32767.0) as i16;
            writer.write_sample(sample).map_err(failed)?;
        }
    }
    writer.finalize().map_err(failed)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn wav_header(code: u16, bits: u16, extensible: bool) -> Vec<u8> {
        let mut h = b"RIFF\0\0\0\0WAVE".to_vec();
        h.extend(b"LIST\x04\0\0\0abcd");
        h.extend(b"fmt ");
        h.extend(40u32.to_le_bytes());
        h.extend((if extensible { 0xFFFEu16 } else { code }).to_le_bytes());
        h.extend(1u16.to_le_bytes());
        h.extend(16000u32.to_le_bytes());
        h.extend(32000u32.to_le_bytes());
        h.extend(2u16.to_le_bytes());
        h.extend(bits.to_le_bytes());
        h.extend(22u16.to_le_bytes());
        h.extend(bits.to_le_bytes());
        h.extend(0u32.to_le_bytes());
        h.extend(code.to_le_bytes());
        h.extend([0u8; 14]);
        h
    }

    #[test]
    fn formats_are_judged_by_their_bytes() {
        assert_eq!(judge(&wav_header(1, 16, false)), Playability::Plays);
        assert_eq!(judge(&wav_header(3, 32, true)), Playability::Plays);
        assert_eq!(
            judge(&wav_header(3, 64, false)),
            Playability::Unlikely("WAV with 64-bit float samples".into())
        );
        assert!(matches!(
            judge(&wav_header(6, 8, false)),
            Playability::Unlikely(_)
        ));
        assert_eq!(judge(b"fLaC\0\0\0\x22"), Playability::Plays);
        assert_eq!(judge(b"ID3\x04\0"), Playability::Plays);
        assert_eq!(
            judge(b"OggS\0\x02........................\x01vorbis"),
            Playability::Plays
        );
        assert!(matches!(
            judge(b"OggS\0\x02....Speex   "),
            Playability::Unlikely(_)
        ));
        assert!(matches!(
            judge(b"FORM\0\0\0\0AIFF"),
            Playability::Unlikely(_)
        ));
    }
}

//! What is checked before the decoding library sees a compressed file.
//!
//! The library trusts sizes written inside a file's metadata: an ID3v2 frame, a FLAC comment
//! block or an Ogg Vorbis comment packet of a few hundred bytes can ask it for gigabytes, which
//! it allocates before reading (and a crafted ID3v2 header reaches an `unreachable!()`). None of
//! that metadata is needed to decode audio, so it is kept away from the library:
//!
//! - ID3v2 tags at the start of a file are skipped by their headers alone, unread;
//! - the container is chosen from the first bytes after them (`fLaC`, `OggS`, `RIFF…WAVE`, an
//!   MPEG frame header) and its reader is made directly, so the library never scans a damaged
//!   file for something that looks like a tag;
//! - FLAC's descriptive blocks (application data, comments, cue sheets, pictures) are presented
//!   as padding, which the library skips unread;
//! - in Ogg Vorbis, whose pages carry checksums (so nothing can be retyped), the comment packet's
//!   length fields are checked against the packet before the library parses it.

use std::fs::File;
use std::io::{ErrorKind, Read, Seek, SeekFrom};
use std::path::Path;

use crate::decode::read_up_to;
use crate::AudioError;

/// The containers isogloss reads through the decoding library.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Container {
    Flac,
    Ogg,
    Wav,
    Mpeg,
}

impl Container {
    /// The container's name in messages.
    pub(crate) fn name(self) -> &'static str {
        match self {
            Container::Flac => "FLAC",
            Container::Ogg => "Ogg",
            Container::Wav => "WAV",
            Container::Mpeg => "MPEG audio",
        }
    }
}

/// Skips leading ID3v2 tags, identifies the container and checks its metadata; returns the
/// stream the decoding library is to read.
pub(crate) fn open(mut file: File, path: &Path) -> Result<(Container, FileFrom), AudioError> {
    let io = |source| AudioError::Io {
        path: path.to_path_buf(),
        source,
    };
    let total = file.metadata().map_err(io)?.len();
    let start = after_id3v2_tags(&mut file, total).map_err(io)?;
    file.seek(SeekFrom::Start(start)).map_err(io)?;
    let mut magic = [0u8; 12];
    let found = read_up_to(&mut file, &mut magic).map_err(io)?;
    let magic = &magic[..found];
    let container = if magic.starts_with(b"fLaC") {
        Container::Flac
    } else if magic.starts_with(b"OggS") {
        Container::Ogg
    } else if magic.starts_with(b"RIFF") && magic.get(8..12) == Some(b"WAVE") {
        Container::Wav
    } else if magic.len() >= 2 && magic[0] == 0xff && magic[1] & 0xe0 == 0xe0 {
        Container::Mpeg
    } else {
        return Err(AudioError::UnknownFormat {
            path: path.to_path_buf(),
            detail: format!(
                "expected a FLAC, Ogg, WAV or MPEG header at byte {start}, found {}",
                describe(magic)
            ),
        });
    };
    let patches = match container {
        Container::Flac => flac_metadata_as_padding(&mut file, start, total).map_err(io)?,
        Container::Ogg => {
            check_vorbis_comments(&mut file, start, path)?;
            Vec::new()
        }
        Container::Wav | Container::Mpeg => Vec::new(),
    };
    file.seek(SeekFrom::Start(start)).map_err(io)?;
    Ok((
        container,
        FileFrom {
            file,
            start,
            len: total - start,
            patches,
        },
    ))
}

fn describe(bytes: &[u8]) -> String {
    if bytes.is_empty() {
        return "the end of the file".into();
    }
    let hex: Vec<String> = bytes.iter().take(4).map(|b| format!("{b:02x}")).collect();
    format!("the bytes {}", hex.join(" "))
}

/// Offset of the first byte after the ID3v2 tags at the start of the file (10-byte header with
/// a 28-bit size, optional 10-byte footer); 0 when there is none.
fn after_id3v2_tags(file: &mut File, total: u64) -> std::io::Result<u64> {
    let mut start = 0u64;
    loop {
        file.seek(SeekFrom::Start(start))?;
        let mut header = [0u8; 10];
        if read_up_to(file, &mut header)? < 10
            || &header[..3] != b"ID3"
            || header[6..].iter().any(|&b| b & 0x80 != 0)
        {
            return Ok(start);
        }
        let size = header[6..]
            .iter()
            .fold(0u64, |size, &b| (size << 7) | u64::from(b));
        let footer = if header[5] & 0x10 != 0 { 10 } else { 0 };
        let next = start + 10 + size + footer;
        if next >= total {
            return Ok(start);
        }
        start = next;
    }
}

/// FLAC metadata blocks the library would parse although nothing in them is needed
/// (application data, Vorbis comments, cue sheets, pictures), as patches that retype them to
/// padding. Only STREAMINFO and SEEKTABLE stay.
fn flac_metadata_as_padding(
    file: &mut File,
    start: u64,
    total: u64,
) -> std::io::Result<Vec<(u64, u8)>> {
    const PADDING: u8 = 1;
    const DESCRIPTIVE: [u8; 4] = [2, 4, 5, 6];
    let mut patches = Vec::new();
    let mut offset = 4u64;
    // A stream has a handful of blocks; the cap only bounds the walk over a damaged file.
    for _ in 0..4096 {
        let mut header = [0u8; 4];
        file.seek(SeekFrom::Start(start + offset))?;
        if read_up_to(file, &mut header)? < 4 {
            break;
        }
        let (last, kind) = (header[0] & 0x80, header[0] & 0x7f);
        if DESCRIPTIVE.contains(&kind) {
            patches.push((offset, last | PADDING));
        }
        let length = u64::from_be_bytes([0, 0, 0, 0, 0, header[1], header[2], header[3]]);
        offset += 4 + length;
        if last != 0 || start + offset >= total {
            break;
        }
    }
    Ok(patches)
}

/// Largest Ogg packet assembled for the check (the comment packet of a real file is a few
/// kilobytes; cover art can make it larger).
const MAX_CHECKED_PACKET_BYTES: usize = 16 << 20;

/// Checks the length fields of a Vorbis comment packet (vendor string, comment count, each
/// comment) against the packet itself, when the first logical stream is Vorbis.
fn check_vorbis_comments(file: &mut File, start: u64, path: &Path) -> Result<(), AudioError> {
    let damaged = |detail: String| AudioError::Damaged {
        path: path.to_path_buf(),
        detail,
    };
    let packets = first_ogg_packets(file, start, 2).map_err(|source| AudioError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let [identification, comments] = packets.as_slice() else {
        // Too short to hold both headers: the library reports that itself.
        return Ok(());
    };
    if !identification.starts_with(b"\x01vorbis") || !comments.starts_with(b"\x03vorbis") {
        return Ok(());
    }
    let mut rest = &comments[7..];
    let mut take_length = |what: &str| -> Result<usize, AudioError> {
        let Some((length, tail)) = rest.split_first_chunk::<4>() else {
            return Err(damaged(format!(
                "the Vorbis comment header ends before its {what}"
            )));
        };
        let length = u32::from_le_bytes(*length) as usize;
        rest = tail;
        Ok(length)
    };
    let vendor = take_length("vendor length")?;
    let skip = |length: usize, what: &str, rest: &mut &[u8]| {
        if length > rest.len() {
            return Err(damaged(format!(
                "the Vorbis comment header gives its {what} a length of {length} bytes, but only {} follow",
                rest.len()
            )));
        }
        *rest = &rest[length..];
        Ok(())
    };
    skip(vendor, "vendor string", &mut rest)?;
    let Some((count, tail)) = rest.split_first_chunk::<4>() else {
        return Err(damaged(
            "the Vorbis comment header ends before its comment count".into(),
        ));
    };
    let count = u32::from_le_bytes(*count) as usize;
    rest = tail;
    if count > rest.len() / 4 {
        return Err(damaged(format!(
            "the Vorbis comment header announces {count} comments, but only {} bytes follow",
            rest.len()
        )));
    }
    for _ in 0..count {
        let Some((length, tail)) = rest.split_first_chunk::<4>() else {
            return Err(damaged(
                "the Vorbis comment header ends inside its comment list".into(),
            ));
        };
        let length = u32::from_le_bytes(*length) as usize;
        rest = tail;
        skip(length, "comment", &mut rest)?;
    }
    Ok(())
}

/// The first `wanted` packets of the first logical stream of an Ogg file (fewer when the file
/// ends or a packet grows beyond [`MAX_CHECKED_PACKET_BYTES`]); pages are taken as they come,
/// without checksums: this only looks at lengths.
fn first_ogg_packets(file: &mut File, start: u64, wanted: usize) -> std::io::Result<Vec<Vec<u8>>> {
    file.seek(SeekFrom::Start(start))?;
    let mut packets: Vec<Vec<u8>> = Vec::new();
    let mut current: Vec<u8> = Vec::new();
    let mut serial = None;
    while packets.len() < wanted {
        let mut header = [0u8; 27];
        if read_up_to(file, &mut header)? < 27 || &header[..4] != b"OggS" {
            break;
        }
        let page_serial = u32::from_le_bytes([header[14], header[15], header[16], header[17]]);
        let mut lacing = vec![0u8; usize::from(header[26])];
        if read_up_to(file, &mut lacing)? < lacing.len() {
            break;
        }
        let body: usize = lacing.iter().map(|&l| usize::from(l)).sum();
        if *serial.get_or_insert(page_serial) != page_serial {
            file.seek(SeekFrom::Current(body as i64))?;
            continue;
        }
        for &segment in &lacing {
            let mut bytes = vec![0u8; usize::from(segment)];
            if read_up_to(file, &mut bytes)? < bytes.len() {
                return Ok(packets);
            }
            current.extend_from_slice(&bytes);
            if current.len() > MAX_CHECKED_PACKET_BYTES {
                return Ok(packets);
            }
            if segment < 255 {
                packets.push(std::mem::take(&mut current));
                if packets.len() == wanted {
                    return Ok(packets);
                }
            }
        }
    }
    Ok(packets)
}

/// A file seen from an offset on: position 0 is `start`. The library reads the audio through
/// it, with the [`flac_metadata_as_padding`] patches applied.
pub(crate) struct FileFrom {
    file: File,
    start: u64,
    len: u64,
    /// Bytes replaced on the way out: `(offset from start, new value)`.
    patches: Vec<(u64, u8)>,
}

impl Read for FileFrom {
    fn read(&mut self, buffer: &mut [u8]) -> std::io::Result<usize> {
        if self.patches.is_empty() {
            return self.file.read(buffer);
        }
        let at = self.file.stream_position()?.saturating_sub(self.start);
        let read = self.file.read(buffer)?;
        for &(offset, value) in &self.patches {
            if (at..at + read as u64).contains(&offset) {
                buffer[(offset - at) as usize] = value;
            }
        }
        Ok(read)
    }
}

impl Seek for FileFrom {
    fn seek(&mut self, position: SeekFrom) -> std::io::Result<u64> {
        let at = match position {
            SeekFrom::Start(offset) => self.file.seek(SeekFrom::Start(self.start + offset))?,
            other => self.file.seek(other)?,
        };
        if at < self.start {
            self.file.seek(SeekFrom::Start(self.start))?;
            return Err(std::io::Error::new(
                ErrorKind::InvalidInput,
                "seek before the start of the audio data",
            ));
        }
        Ok(at - self.start)
    }
}

impl symphonia::core::io::MediaSource for FileFrom {
    fn is_seekable(&self) -> bool {
        true
    }

    fn byte_len(&self) -> Option<u64> {
        Some(self.len)
    }
}

//! Reading a recording of any length as a stream of fixed-size 16 kHz mono chunks.

use std::path::Path;

use crate::decode::{self, Source};
use crate::resample::StreamResampler;
use crate::{AudioError, AudioInfo, SAMPLE_RATE};

/// Streams a file as 16 kHz mono chunks of a fixed length (the last one may be shorter), holding
/// only about one chunk plus one decoder block in memory, so multi-hour archive recordings can be
/// transcribed on a small machine. Chunks join seamlessly: concatenated they equal
/// [`read_mono_16k`](crate::read_mono_16k).
///
/// ```no_run
/// # fn main() -> Result<(), isogloss_audio::AudioError> {
/// let mut reader = isogloss_audio::ChunkReader::open("archive.mp3".as_ref(), 30 * 16_000)?;
/// while let Some(chunk) = reader.next_chunk()? {
///     println!("{} samples", chunk.len());
/// }
/// # Ok(())
/// # }
/// ```
pub struct ChunkReader {
    source: Source,
    resampler: StreamResampler,
    chunk_samples: usize,
    /// Decoded samples at the file's own rate, waiting for the resampler.
    decoded: Vec<f32>,
    /// 16 kHz samples not yet handed out.
    ready: Vec<f32>,
    finished: bool,
}

impl ChunkReader {
    /// Opens `path` for chunks of `chunk_samples` samples at 16 kHz (at least 1).
    pub fn open(path: &Path, chunk_samples: usize) -> Result<Self, AudioError> {
        let source = decode::open(path)?;
        let resampler = StreamResampler::new(source.sample_rate(), SAMPLE_RATE);
        let chunk_samples = chunk_samples.max(1);
        Ok(ChunkReader {
            source,
            resampler,
            chunk_samples,
            decoded: Vec::new(),
            ready: Vec::with_capacity(chunk_samples),
            finished: false,
        })
    }

    /// The header's account of the file, when it states the length.
    pub fn info(&self) -> Option<AudioInfo> {
        self.source.info()
    }

    /// The next chunk, or `None` after the last one. An error (damaged data, NaN) ends the stream.
    pub fn next_chunk(&mut self) -> Result<Option<Vec<f32>>, AudioError> {
        while self.ready.len() < self.chunk_samples && !self.finished {
            self.decoded.clear();
            if self.source.read_block(&mut self.decoded)? {
                self.resampler.push(&self.decoded, &mut self.ready);
            } else {
                self.resampler.finish(&mut self.ready);
                self.finished = true;
            }
        }
        if self.ready.is_empty() {
            return Ok(None);
        }
        let take = self.chunk_samples.min(self.ready.len());
        let rest = self.ready.split_off(take);
        Ok(Some(std::mem::replace(&mut self.ready, rest)))
    }

    /// The file being read.
    pub fn path(&self) -> &Path {
        self.source.path()
    }
}

impl Iterator for ChunkReader {
    type Item = Result<Vec<f32>, AudioError>;

    fn next(&mut self) -> Option<Self::Item> {
        if self.finished && self.ready.is_empty() {
            return None;
        }
        match self.next_chunk() {
            Ok(chunk) => chunk.map(Ok),
            Err(error) => {
                // Stop after reporting: the stream cannot be trusted past damage.
                self.finished = true;
                self.ready.clear();
                Some(Err(error))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::read_mono_16k;
    use crate::test_support::*;

    #[test]
    fn chunks_concatenate_to_the_whole_file() {
        let (_dir, path) = temp_path("talk.wav");
        write_wav_i16(&path, 48_000, 1, &sine(48_000, 300.0, 0.4, 2.5));
        let whole = read_mono_16k(&path).unwrap();
        let chunks: Vec<Vec<f32>> = ChunkReader::open(&path, 7_000)
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        assert_eq!(chunks.len(), 6);
        assert!(chunks[..5].iter().all(|c| c.len() == 7_000));
        assert_eq!(chunks.concat(), whole);
    }

    #[test]
    fn memory_stays_bounded_by_the_chunk() {
        // 60 s at 44.1 kHz read in 1 s chunks: the buffer of pending samples never grows
        // beyond a chunk plus one decoder block's worth of output.
        let (_dir, path) = temp_path("hour.wav");
        write_wav_i16(&path, 44_100, 1, &sine(44_100, 200.0, 0.2, 60.0));
        let mut reader = ChunkReader::open(&path, 16_000).unwrap();
        let mut total = 0;
        let mut largest_backlog = 0;
        while let Some(chunk) = reader.next_chunk().unwrap() {
            total += chunk.len();
            largest_backlog = largest_backlog.max(reader.ready.capacity());
        }
        assert_eq!(total, 960_000);
        assert!(largest_backlog < 2 * 16_000, "{largest_backlog}");
    }
}

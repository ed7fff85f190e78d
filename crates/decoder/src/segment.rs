//! Voice-activity segmentation of long recordings, streaming and in bounded memory.
//!
//! The signal is cut into 10 ms blocks; a block's energy (dB relative to full scale) is speech
//! when it lies `threshold_db` above the noise floor and above an absolute minimum. The noise
//! floor is the minimum block energy over the last `floor_window_seconds` (a sliding-window
//! minimum, kept with a monotonic queue): it follows a quieter or louder room within one window,
//! while the dips between syllables keep it near the true background during speech. A segment
//! opens at a speech block (with `padding_seconds` of audio before it), stays open for
//! `hangover_seconds` after the last speech block, and is dropped when it holds less than
//! `min_speech_seconds` of speech (clicks, door slams). A segment that reaches
//! `max_segment_seconds` is cut at its lowest-energy block in its second half, and the rest
//! carries on as the next segment; so no segment is longer than the cap and memory is bounded by
//! it, whatever the recording's length.

use std::collections::VecDeque;

/// Settings of the voice-activity segmenter; `Default` suits interview recordings at 16 kHz.
#[derive(Debug, Clone, PartialEq)]
pub struct VadConfig {
    /// Block length for the energy measure, in seconds.
    pub block_seconds: f64,
    /// Speech must exceed the noise floor by this many dB.
    pub threshold_db: f32,
    /// Blocks quieter than this (dBFS) are never speech.
    pub absolute_min_db: f32,
    /// Window of the sliding minimum that estimates the noise floor.
    pub floor_window_seconds: f64,
    /// How long a segment stays open after the last speech block.
    pub hangover_seconds: f64,
    /// Audio kept before the first speech block of a segment.
    pub padding_seconds: f64,
    /// Segments with less speech than this are dropped.
    pub min_speech_seconds: f64,
    /// No segment is longer than this.
    pub max_segment_seconds: f64,
}

/// Longest segment the segmenter can be asked for (seconds). Segments are held in memory and
/// decoded whole, so the cap bounds memory; an hour is far beyond any pause-free stretch.
pub const MAX_SEGMENT_LIMIT_SECONDS: f64 = 3600.0;

impl VadConfig {
    /// Checks every setting: finite, block length within (0, 1] s, durations within 0 to
    /// [`MAX_SEGMENT_LIMIT_SECONDS`], `max_segment_seconds` from 1 s to that limit. The error
    /// names the setting, the range and the value found.
    pub fn validate(&self) -> Result<(), crate::DecodeError> {
        let invalid = |setting: &'static str, expected: String, found: f64| {
            Err(crate::DecodeError::InvalidSetting {
                setting,
                expected,
                found: found.to_string(),
            })
        };
        let limit = MAX_SEGMENT_LIMIT_SECONDS;
        if !(self.block_seconds > 0.0 && self.block_seconds <= 1.0) {
            return invalid(
                "block_seconds",
                "from above 0 to 1 s".into(),
                self.block_seconds,
            );
        }
        if !(self.max_segment_seconds >= 1.0 && self.max_segment_seconds <= limit) {
            return invalid(
                "max_segment_seconds",
                format!("from 1 to {limit} s"),
                self.max_segment_seconds,
            );
        }
        for (setting, value) in [
            ("floor_window_seconds", self.floor_window_seconds),
            ("hangover_seconds", self.hangover_seconds),
            ("padding_seconds", self.padding_seconds),
            ("min_speech_seconds", self.min_speech_seconds),
        ] {
            if !(0.0..=limit).contains(&value) {
                return invalid(setting, format!("from 0 to {limit} s"), value);
            }
        }
        for (setting, value) in [
            ("threshold_db", self.threshold_db),
            ("absolute_min_db", self.absolute_min_db),
        ] {
            if !value.is_finite() {
                return invalid(setting, "a finite number of dB".into(), f64::from(value));
            }
        }
        Ok(())
    }
}

impl Default for VadConfig {
    fn default() -> Self {
        VadConfig {
            block_seconds: 0.01,
            threshold_db: 10.0,
            absolute_min_db: -60.0,
            floor_window_seconds: 5.0,
            hangover_seconds: 0.3,
            padding_seconds: 0.15,
            min_speech_seconds: 0.1,
            max_segment_seconds: 30.0,
        }
    }
}

/// A stretch of speech cut out of a recording.
#[derive(Debug, Clone, PartialEq)]
pub struct SpeechSegment {
    /// Index of the segment's first sample in the recording.
    pub start_sample: u64,
    /// The segment's samples.
    pub samples: Vec<f32>,
}

impl SpeechSegment {
    /// Start time in seconds from the start of the recording.
    pub fn start_seconds(&self, sample_rate: u32) -> f64 {
        self.start_sample as f64 / sample_rate as f64
    }

    /// End time in seconds from the start of the recording.
    pub fn end_seconds(&self, sample_rate: u32) -> f64 {
        (self.start_sample + self.samples.len() as u64) as f64 / sample_rate as f64
    }
}

struct OpenSegment {
    start_sample: u64,
    samples: Vec<f32>,
    /// Energy of every block in `samples` (the padding included).
    energies: Vec<f32>,
    speech_blocks: usize,
    /// Blocks left before the segment closes without new speech.
    hangover_left: usize,
}

/// Streaming segmenter: feed samples in chunks of any size with [`Segmenter::push`], collect
/// finished segments, and call [`Segmenter::finish`] at the end.
pub struct Segmenter {
    config: VadConfig,
    block: usize,
    hangover_blocks: usize,
    min_speech_blocks: usize,
    max_blocks: usize,
    floor_window: usize,
    /// Samples not yet forming a full block.
    partial: Vec<f32>,
    /// Index of the next block.
    block_index: u64,
    /// `(block index, energy)` with increasing energies: the sliding-window minimum.
    floor: VecDeque<(u64, f32)>,
    /// Recent non-speech blocks kept as padding for the next segment.
    padding: VecDeque<(Vec<f32>, f32)>,
    padding_blocks: usize,
    open: Option<OpenSegment>,
}

impl Segmenter {
    /// A segmenter for audio at `sample_rate`.
    pub fn new(config: VadConfig, sample_rate: u32) -> Self {
        let rate = sample_rate as f64;
        let block = ((config.block_seconds * rate).round() as usize).max(1);
        let blocks = |seconds: f64| (seconds * rate / block as f64).round().max(0.0) as usize;
        Segmenter {
            block,
            hangover_blocks: blocks(config.hangover_seconds).max(1),
            min_speech_blocks: blocks(config.min_speech_seconds),
            max_blocks: blocks(config.max_segment_seconds).max(2),
            floor_window: blocks(config.floor_window_seconds).max(1),
            padding_blocks: blocks(config.padding_seconds),
            partial: Vec::with_capacity(block),
            block_index: 0,
            floor: VecDeque::new(),
            padding: VecDeque::new(),
            open: None,
            config,
        }
    }

    /// Consumes samples; finished segments are appended to `out`.
    pub fn push(&mut self, samples: &[f32], out: &mut Vec<SpeechSegment>) {
        let mut rest = samples;
        while !rest.is_empty() {
            let take = (self.block - self.partial.len()).min(rest.len());
            self.partial.extend_from_slice(&rest[..take]);
            rest = &rest[take..];
            if self.partial.len() == self.block {
                let block = std::mem::take(&mut self.partial);
                self.process_block(&block, out);
                self.partial = block;
                self.partial.clear();
            }
        }
    }

    /// Ends the recording: a partial last block and the open segment are flushed into `out`.
    pub fn finish(&mut self, out: &mut Vec<SpeechSegment>) {
        if !self.partial.is_empty() {
            let block = std::mem::take(&mut self.partial);
            if let Some(open) = &mut self.open {
                open.samples.extend_from_slice(&block);
                open.energies.push(energy_db(&block));
            }
        }
        self.close(out);
    }

    fn process_block(&mut self, block: &[f32], out: &mut Vec<SpeechSegment>) {
        let energy = energy_db(block);
        let index = self.block_index;
        self.block_index += 1;
        while self.floor.back().is_some_and(|&(_, e)| e >= energy) {
            self.floor.pop_back();
        }
        self.floor.push_back((index, energy));
        while self
            .floor
            .front()
            .is_some_and(|&(i, _)| i + (self.floor_window as u64) <= index)
        {
            self.floor.pop_front();
        }
        let floor = self.floor.front().map(|&(_, e)| e).unwrap_or(energy);
        let speech =
            energy >= self.config.absolute_min_db && energy > floor + self.config.threshold_db;
        let block_start = index * self.block as u64;
        match &mut self.open {
            Some(open) => {
                open.samples.extend_from_slice(block);
                open.energies.push(energy);
                if speech {
                    open.speech_blocks += 1;
                    open.hangover_left = self.hangover_blocks;
                } else {
                    open.hangover_left -= 1;
                }
                if open.hangover_left == 0 {
                    self.close(out);
                } else if open.energies.len() >= self.max_blocks {
                    self.cut(out);
                }
            }
            None if speech => {
                let padding: Vec<(Vec<f32>, f32)> = self.padding.drain(..).collect();
                let start_sample = block_start - (padding.len() * self.block) as u64;
                // Room for up to 30 s; a longer segment grows as its blocks arrive.
                let reserved = self.max_blocks.min(3000);
                let mut samples = Vec::with_capacity(reserved * self.block);
                let mut energies = Vec::with_capacity(reserved);
                for (s, e) in padding {
                    samples.extend_from_slice(&s);
                    energies.push(e);
                }
                samples.extend_from_slice(block);
                energies.push(energy);
                self.open = Some(OpenSegment {
                    start_sample,
                    samples,
                    energies,
                    speech_blocks: 1,
                    hangover_left: self.hangover_blocks,
                });
            }
            None => {
                if self.padding_blocks > 0 {
                    if self.padding.len() == self.padding_blocks {
                        self.padding.pop_front();
                    }
                    self.padding.push_back((block.to_vec(), energy));
                }
            }
        }
    }

    /// Cuts a full segment at its quietest block in the second half; the rest stays open.
    fn cut(&mut self, out: &mut Vec<SpeechSegment>) {
        let Some(open) = &mut self.open else { return };
        let half = open.energies.len() / 2;
        let (offset, _) =
            open.energies[half..]
                .iter()
                .enumerate()
                .fold(
                    (0, f32::INFINITY),
                    |best, (i, &e)| if e < best.1 { (i, e) } else { best },
                );
        let cut_block = half + offset;
        let cut_sample = (cut_block * self.block).min(open.samples.len());
        let rest_samples = open.samples.split_off(cut_sample);
        let rest_energies = open.energies.split_off(cut_block);
        let head = SpeechSegment {
            start_sample: open.start_sample,
            samples: std::mem::replace(&mut open.samples, rest_samples),
        };
        open.start_sample += head.samples.len() as u64;
        open.energies = rest_energies;
        // The head held speech (the segment was opened by it); the rest is judged on its own.
        open.speech_blocks = 0;
        out.push(head);
    }

    fn close(&mut self, out: &mut Vec<SpeechSegment>) {
        if let Some(open) = self.open.take() {
            if open.speech_blocks >= self.min_speech_blocks.max(1) {
                out.push(SpeechSegment {
                    start_sample: open.start_sample,
                    samples: open.samples,
                });
            }
        }
    }
}

/// Block energy in dB relative to a full-scale square wave (floor −100 dB for silence).
fn energy_db(block: &[f32]) -> f32 {
    let mean_square = block.iter().map(|&x| x * x).sum::<f32>() / block.len().max(1) as f32;
    10.0 * (mean_square + 1e-10).log10()
}

/// Segments a whole signal held in memory (for short files and tests).
pub fn segment_all(samples: &[f32], sample_rate: u32, config: &VadConfig) -> Vec<SpeechSegment> {
    let mut segmenter = Segmenter::new(config.clone(), sample_rate);
    let mut out = Vec::new();
    segmenter.push(samples, &mut out);
    segmenter.finish(&mut out);
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    const RATE: u32 = 16_000;

    /// Background noise at about `noise_db` dBFS with speech-like bursts: a 180 Hz tone under a
    /// 4 Hz syllable envelope (dips to 2 %, as between syllables) at about −15 dBFS, in the given `(start, end)` seconds.
    fn signal(seconds: f64, bursts: &[(f64, f64)], noise_db: f32, seed: u64) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let noise = 10f32.powf(noise_db / 20.0) * 3f32.sqrt();
        (0..(seconds * RATE as f64) as usize)
            .map(|n| {
                let t = n as f64 / RATE as f64;
                let mut x = rng.random_range(-noise..noise);
                if bursts.iter().any(|&(a, b)| t >= a && t < b) {
                    let envelope = 0.02 + 0.98 * (std::f64::consts::PI * 4.0 * t).sin().abs();
                    x += (0.25 * envelope * (2.0 * std::f64::consts::PI * 180.0 * t).sin()) as f32;
                }
                x
            })
            .collect()
    }

    fn spans(segments: &[SpeechSegment]) -> Vec<(f64, f64)> {
        segments
            .iter()
            .map(|s| (s.start_seconds(RATE), s.end_seconds(RATE)))
            .collect()
    }

    #[test]
    fn finds_bursts_with_padding_and_hangover() {
        let x = signal(10.0, &[(1.0, 2.5), (5.0, 7.0)], -50.0, 1);
        let segments = segment_all(&x, RATE, &VadConfig::default());
        let found = spans(&segments);
        assert_eq!(found.len(), 2, "{found:?}");
        for ((a, b), (start, end)) in [(1.0, 2.5), (5.0, 7.0)].into_iter().zip(found) {
            assert!(
                (start - (a - 0.15)).abs() <= 0.02,
                "start {start} for burst at {a}"
            );
            assert!(
                (end - (b + 0.3)).abs() <= 0.03,
                "end {end} for burst ending at {b}"
            );
        }
    }

    #[test]
    fn a_gap_shorter_than_the_hangover_does_not_split() {
        let x = signal(5.0, &[(1.0, 2.0), (2.2, 3.0)], -50.0, 2);
        assert_eq!(segment_all(&x, RATE, &VadConfig::default()).len(), 1);
        let x = signal(5.0, &[(1.0, 2.0), (2.6, 3.0)], -50.0, 2);
        assert_eq!(segment_all(&x, RATE, &VadConfig::default()).len(), 2);
    }

    #[test]
    fn the_floor_adapts_to_a_louder_room() {
        // 8 s of quiet noise, then 12 s of noise 25 dB louder with one burst at 16–17 s.
        let mut x = signal(8.0, &[], -60.0, 3);
        let loud = signal(12.0, &[(8.0, 9.0)], -35.0, 4);
        x.extend(loud);
        let found = spans(&segment_all(&x, RATE, &VadConfig::default()));
        // the step itself may open one segment, but once the window has passed only the burst
        let late: Vec<_> = found.iter().filter(|s| s.0 > 8.0 + 5.5).collect();
        assert_eq!(late.len(), 1, "{found:?}");
        assert!((late[0].0 - 15.85).abs() < 0.05);
    }

    #[test]
    fn settings_are_checked_against_their_limits() {
        // Issue 16: `--max-segment 1e9` reserved a buffer for 1e9 s (an abort) and `inf` panicked.
        for value in [
            1e9,
            f64::INFINITY,
            f64::NAN,
            0.5,
            MAX_SEGMENT_LIMIT_SECONDS + 1.0,
        ] {
            let config = VadConfig {
                max_segment_seconds: value,
                ..VadConfig::default()
            };
            let message = config.validate().unwrap_err().to_string();
            assert!(
                message.contains("max_segment_seconds") && message.contains("from 1 to 3600 s"),
                "{message}"
            );
        }
        VadConfig {
            max_segment_seconds: MAX_SEGMENT_LIMIT_SECONDS,
            ..VadConfig::default()
        }
        .validate()
        .unwrap();
        VadConfig::default().validate().unwrap();
    }

    #[test]
    fn long_speech_is_cut_at_the_quietest_point_within_the_cap() {
        let config = VadConfig {
            max_segment_seconds: 4.0,
            ..VadConfig::default()
        };
        // continuous speech 1–12 s with a near-silent 50 ms dip at 4.0 s
        let mut x = signal(13.0, &[(1.0, 12.0)], -50.0, 5);
        for v in &mut x[(4.0 * RATE as f64) as usize..(4.05 * RATE as f64) as usize] {
            *v *= 0.001;
        }
        let segments = segment_all(&x, RATE, &config);
        let found = spans(&segments);
        for (a, b) in &found {
            assert!(b - a <= 4.0 + 1e-9, "{found:?}");
        }
        assert!((found[0].1 - 4.0).abs() <= 0.01, "{found:?}");
        // the pieces tile the speech without gaps or overlaps
        for pair in found.windows(2) {
            assert!((pair[0].1 - pair[1].0).abs() < 1e-9, "{found:?}");
        }
        assert!(found.last().unwrap().1 >= 12.0, "{found:?}");
    }

    #[test]
    fn streaming_in_odd_chunks_equals_one_pass() {
        let x = signal(12.0, &[(0.5, 2.0), (3.0, 9.5), (10.0, 10.4)], -45.0, 6);
        let config = VadConfig {
            max_segment_seconds: 3.0,
            ..VadConfig::default()
        };
        let whole = segment_all(&x, RATE, &config);
        let mut segmenter = Segmenter::new(config, RATE);
        let mut streamed = Vec::new();
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut rest = x.as_slice();
        while !rest.is_empty() {
            let n = rng.random_range(1..5000).min(rest.len());
            segmenter.push(&rest[..n], &mut streamed);
            rest = &rest[n..];
        }
        segmenter.finish(&mut streamed);
        assert_eq!(whole, streamed);
        assert!(whole.len() >= 4);
    }

    #[test]
    fn silence_and_clicks_give_no_segment() {
        let mut x = vec![0.0f32; RATE as usize * 3];
        x[RATE as usize] = 0.9; // a one-sample click
        assert!(segment_all(&x, RATE, &VadConfig::default()).is_empty());
    }
}

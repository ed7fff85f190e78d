//! Long recordings: segment a stream of audio, decode the segments in parallel, and place the
//! words on the recording's time line.
//!
//! The stream is consumed in chunks; speech segments are collected until a batch is full, the
//! batch is decoded on all rayon threads (one decoder with its scratch buffers per thread), and
//! only the timed words are kept. Memory therefore depends on the batch size and the segment
//! cap, not on the recording's length.

use ndarray::Array2;
use rayon::prelude::*;

use crate::output::TimedSegment;
use crate::segment::{Segmenter, SpeechSegment, VadConfig};
use crate::{DecodeError, Decoder};

/// One reading of a segment: log posteriors `[frames, units]` and the seconds between two of
/// those frames in the segment (the model's frame shift; another one where the model read the
/// segment at another tempo).
pub type Reading = (Array2<f32>, f64);

/// Decodes one segment's readings ([`Decoder::decode_readings`]): the transcript the decoder
/// kept and the seconds between the frames of the reading it came from (0 without readings).
pub fn decode_timed<D: Decoder + ?Sized>(
    decoder: &mut D,
    readings: &[Reading],
) -> Result<(crate::Transcript, f64), DecodeError> {
    let views: Vec<_> = readings.iter().map(|(p, _)| p.view()).collect();
    let (transcript, chosen) = decoder.decode_readings(&views)?;
    let shift = readings.get(chosen).map_or(0.0, |(_, shift)| *shift);
    Ok((transcript, shift))
}

/// Decodes `segments` in parallel. `posteriors` turns a segment's samples into its readings
/// (features + acoustic model; several for a test-time search, the acoustic side's preferred
/// first), of which the decoder keeps one ([`Decoder::decode_readings`]); `new_decoder` makes
/// one decoder per worker thread. Results keep the input order; one failing segment does not
/// stop the others.
pub fn decode_segments<D, E, P, N>(
    segments: &[SpeechSegment],
    sample_rate: u32,
    posteriors: P,
    new_decoder: N,
) -> Vec<Result<TimedSegment, E>>
where
    D: Decoder,
    E: From<DecodeError> + Send,
    P: Fn(&[f32]) -> Result<Vec<Reading>, E> + Sync,
    N: Fn() -> D + Sync,
{
    segments
        .par_iter()
        .map_init(&new_decoder, |decoder, segment| {
            let (transcript, frame_shift_seconds) =
                decode_timed(decoder, &posteriors(&segment.samples)?)?;
            Ok(TimedSegment::from_transcript(
                &transcript,
                segment.start_seconds(sample_rate),
                segment.end_seconds(sample_rate),
                frame_shift_seconds,
            ))
        })
        .collect()
}

/// How a stream is cut and batched.
#[derive(Debug, Clone)]
pub struct StreamSettings {
    /// Sample rate of the chunks.
    pub sample_rate: u32,
    /// Voice-activity segmentation.
    pub vad: VadConfig,
    /// Segments decoded together (in parallel) before the next chunk is read.
    pub batch_segments: usize,
}

/// Transcribes a recording delivered as a stream of sample chunks: voice-activity
/// segmentation, then [`decode_segments`] on batches of `batch_segments` segments.
/// `on_progress` is called after each batch with the seconds of audio consumed so far.
/// Stops at the first error (of the stream or of a segment).
pub fn transcribe_stream<D, E, I, P, N>(
    chunks: I,
    settings: &StreamSettings,
    posteriors: P,
    new_decoder: N,
    mut on_progress: impl FnMut(f64),
) -> Result<Vec<TimedSegment>, E>
where
    D: Decoder,
    E: From<DecodeError> + Send,
    I: IntoIterator<Item = Result<Vec<f32>, E>>,
    P: Fn(&[f32]) -> Result<Vec<Reading>, E> + Sync,
    N: Fn() -> D + Sync,
{
    let sample_rate = settings.sample_rate;
    let mut segmenter = Segmenter::new(settings.vad.clone(), sample_rate);
    let mut pending = Vec::new();
    let mut out = Vec::new();
    let mut consumed = 0u64;
    let batch = settings.batch_segments.max(1);
    let flush = |pending: &mut Vec<SpeechSegment>, out: &mut Vec<TimedSegment>| -> Result<(), E> {
        for result in decode_segments(pending, sample_rate, &posteriors, &new_decoder) {
            out.push(result?);
        }
        pending.clear();
        Ok(())
    };
    for chunk in chunks {
        let chunk = chunk?;
        consumed += chunk.len() as u64;
        segmenter.push(&chunk, &mut pending);
        if pending.len() >= batch {
            flush(&mut pending, &mut out)?;
            on_progress(consumed as f64 / sample_rate as f64);
        }
    }
    segmenter.finish(&mut pending);
    flush(&mut pending, &mut out)?;
    on_progress(consumed as f64 / sample_rate as f64);
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{GreedyDecoder, SearchGraph};

    /// A stand-in acoustic model: one frame per 10 ms; a frame is unit 1 ("a") when the
    /// samples are loud, blank otherwise; a loud stretch is a word.
    fn fake_posteriors(samples: &[f32]) -> Result<(Array2<f32>, f64), DecodeError> {
        let frames = samples.len() / 160;
        let posteriors = Array2::from_shape_fn((frames, 3), |(t, u)| {
            let loud = samples[t * 160..(t + 1) * 160]
                .iter()
                .any(|x| x.abs() > 0.1);
            let hit = if loud { u == 1 } else { u == 0 };
            if hit {
                (0.98f32).ln()
            } else {
                (0.01f32).ln()
            }
        });
        Ok((posteriors, 0.01))
    }

    /// The same model reading the segment at a slower frame rate (every other frame, 20 ms
    /// apart), as a tempo-changed front end does: the words must land at the same times.
    fn fake_posteriors_every_other_frame(
        samples: &[f32],
    ) -> Result<(Array2<f32>, f64), DecodeError> {
        let (all, shift) = fake_posteriors(samples)?;
        let kept = all.slice(ndarray::s![..;2, ..]).to_owned();
        Ok((kept, 2.0 * shift))
    }

    /// Two readings of a segment, the first less sure of itself and on a wrong time line (its
    /// frames claimed 5 ms apart): a decoder that compares hypotheses must keep the second
    /// and place the words with the second's frame shift; a greedy decoder keeps the first.
    fn two_readings(samples: &[f32]) -> Result<Vec<Reading>, DecodeError> {
        let (sure, shift) = fake_posteriors(samples)?;
        let unsure = sure.mapv(|v| {
            if v > 0.5f32.ln() {
                0.6f32.ln()
            } else {
                0.2f32.ln()
            }
        });
        let every_other = sure.slice(ndarray::s![..;2, ..]).to_owned();
        Ok(vec![(unsure, shift / 2.0), (every_other, 2.0 * shift)])
    }

    #[test]
    fn words_land_on_the_recording_time_line_in_order() {
        let graph =
            SearchGraph::lexicon_free(vec!["<ctc-blank>".into(), "a".into(), "<wb>".into()])
                .unwrap();
        let greedy = || GreedyDecoder::new(&graph);
        let one = |p: fn(&[f32]) -> Timed| move |s: &[f32]| p(s).map(|r| vec![r]);
        words_land_at_the_bursts(one(fake_posteriors), greedy, 0.011, 1.0);
        words_land_at_the_bursts(one(fake_posteriors_every_other_frame), greedy, 0.021, 1.0);
        // The greedy decoder keeps the first reading: times at half the true ones.
        words_land_at_the_bursts(two_readings, greedy, 0.011, 0.5);
        let lm = crate::NoLanguageModel;
        let beam = || crate::PrefixBeamSearch::new(&graph, &lm, crate::SearchOptions::default());
        words_land_at_the_bursts(one(fake_posteriors), beam, 0.011, 1.0);
        words_land_at_the_bursts(two_readings, beam, 0.021, 1.0);
    }

    /// Posteriors of a segment and the seconds between their frames.
    type Timed = Result<(Array2<f32>, f64), DecodeError>;

    /// Transcribes three half-second bursts in 40 s of faint noise and checks each word lands
    /// at its burst's times × `scale` (1: the true time line), within `tolerance` seconds.
    fn words_land_at_the_bursts<D: Decoder>(
        posteriors: impl Fn(&[f32]) -> Result<Vec<Reading>, DecodeError> + Sync,
        new_decoder: impl Fn() -> D + Sync,
        tolerance: f64,
        scale: f64,
    ) {
        let rate = 16_000;
        // a loud square wave at 2–2.5 s, 10–10.5 s and 30–30.5 s in 40 s of faint noise
        let bursts = [2.0, 10.0, 30.0];
        let signal: Vec<f32> = (0..40 * rate)
            .map(|n| {
                let t = n as f64 / rate as f64;
                let loud = bursts.iter().any(|&b| t >= b && t < b + 0.5);
                let sign = if (n / 40) % 2 == 0 { 1.0 } else { -1.0 };
                sign * if loud { 0.5 } else { 0.001 }
            })
            .collect();
        let chunks = signal
            .chunks(12_345)
            .map(|c| Ok::<_, DecodeError>(c.to_vec()));
        let mut progress = Vec::new();
        let segments = transcribe_stream(
            chunks,
            &StreamSettings {
                sample_rate: rate as u32,
                vad: VadConfig::default(),
                batch_segments: 2,
            },
            posteriors,
            new_decoder,
            |seconds| progress.push(seconds),
        )
        .unwrap();
        assert_eq!(segments.len(), 3);
        for (segment, burst) in segments.iter().zip(bursts) {
            assert_eq!(segment.words.len(), 1);
            let w = &segment.words[0];
            let at = |t: f64| segment.start + (t - segment.start) * scale;
            assert!((w.start - at(burst)).abs() <= tolerance, "{w:?} vs {burst}");
            assert!((w.end - at(burst + 0.5)).abs() <= tolerance, "{w:?}");
            assert!(segment.start <= w.start && w.end <= segment.end);
        }
        assert!(progress.windows(2).all(|p| p[0] <= p[1]));
        assert_eq!(*progress.last().unwrap(), 40.0);
    }
}

//! Online extraction: a running i-vector over a sliding window, frame-synchronous on a stream.
//!
//! The contract, with W = `window_seconds / frame_shift` frames (rounded, at least 1) and
//! K = `period_frames`: frame t (0-based, counted from the start of the stream) gets the
//! post-processed i-vector of the frames
//!
//! ```text
//! max(0, u − W + 1) ..= u,   where u = K·⌊t/K⌋
//! ```
//!
//! that is, the vector is recomputed at frames 0, K, 2K, … from the last W frames up to and
//! including that frame, and held until the next recomputation. Frame t's vector depends only on
//! frames up to t, so a stream can be fed in pieces of any size and gives the same vectors as
//! the whole recording at once; at the start of a stream the window is short and the vector
//! close to the prior mean (zero before post-processing).
//!
//! The window's statistics are running sums in f64: a frame's posteriors and values are added
//! when it arrives and subtracted when it leaves the window (they are kept for that, W frames of
//! them). The i-vectors of all recomputation points of a block of frames are solved together
//! (two matrix products and one R×R Cholesky factorisation per point).

use ndarray::{s, Array1, Array2, ArrayView2};

use crate::extractor::{check_frames, IvectorExtractor};
use crate::ubm::BLOCK_FRAMES;
use crate::SpeakerError;

/// The state of one stream. Feed frames with [`OnlineIvectors::push`].
#[derive(Debug, Clone)]
pub struct OnlineIvectors<'a> {
    extractor: &'a IvectorExtractor,
    item: String,
    window: usize,
    period: usize,
    /// Posterior entries kept per frame: `top_gaussians`, or all Gaussians.
    kept: usize,
    frames_seen: usize,
    occupancy: Array1<f64>,
    first_order: Array2<f64>,
    /// Gaussian index and posterior of the kept entries of the frames in the window, by slot
    /// (frame t lives in slot t mod W).
    ring_gaussians: Vec<usize>,
    ring_posteriors: Vec<f64>,
    /// The frames in the window, by slot, in f64.
    ring_frames: Vec<f64>,
    current: Array1<f32>,
}

impl<'a> OnlineIvectors<'a> {
    /// A new stream with an empty window; `item` names it in errors.
    pub fn new(extractor: &'a IvectorExtractor, item: &str) -> Self {
        let (gaussians, dims) = (extractor.ubm.gaussians(), extractor.ubm.dims());
        let top = extractor.config.top_gaussians;
        OnlineIvectors {
            extractor,
            item: item.to_string(),
            window: extractor.window_frames(),
            period: extractor.config.period_frames,
            kept: if top == 0 { gaussians } else { top },
            frames_seen: 0,
            occupancy: Array1::zeros(gaussians),
            first_order: Array2::zeros((gaussians, dims)),
            ring_gaussians: Vec::new(),
            ring_posteriors: Vec::new(),
            ring_frames: Vec::new(),
            current: Array1::zeros(extractor.output_dimension()),
        }
    }

    /// Frames pushed so far.
    pub fn frames_seen(&self) -> usize {
        self.frames_seen
    }

    /// The vector of the last frame pushed (zeros before any frame).
    pub fn current(&self) -> &Array1<f32> {
        &self.current
    }

    /// Takes the next frames of the stream (`[frames, dims]`, any number) and returns the vector
    /// of each, `[frames, output dimension]`, as the module doc defines it. On a bad frame
    /// (wrong dimension, non-finite value) nothing of this call is taken and the error names the
    /// frame's index in the stream.
    pub fn push(&mut self, frames: ArrayView2<f32>) -> Result<Array2<f32>, SpeakerError> {
        let extractor = self.extractor;
        let dims = extractor.ubm.dims();
        check_frames(&self.item, frames, dims, self.frames_seen)?;
        let rows = frames.nrows();
        let gaussians = extractor.ubm.gaussians();
        let means = extractor.ubm.means();
        let mut out = Array2::<f32>::zeros((rows, extractor.output_dimension()));
        for start in (0..rows).step_by(BLOCK_FRAMES) {
            let end = (start + BLOCK_FRAMES).min(rows);
            let (posteriors, x) = extractor.ubm.block_posteriors_and_frames(
                frames.slice(s![start..end, ..]),
                extractor.config.top_gaussians,
            );
            // (local row, snapshot index) of every recomputation point in this block.
            let mut points: Vec<usize> = Vec::new();
            let mut snapshot_occupancy: Vec<f64> = Vec::new();
            let mut snapshot_centred: Vec<f64> = Vec::new();
            for i in 0..end - start {
                let frame = self.frames_seen;
                let slot = frame % self.window;
                if frame >= self.window {
                    self.remove_slot(slot, dims);
                }
                self.add_frame(
                    slot,
                    posteriors.row(i).as_slice().unwrap_or(&[]),
                    x.row(i).as_slice().unwrap_or(&[]),
                );
                if frame % self.period == 0 {
                    points.push(i);
                    snapshot_occupancy.extend(self.occupancy.iter());
                    for c in 0..gaussians {
                        let n = self.occupancy[c];
                        for d in 0..dims {
                            snapshot_centred.push(self.first_order[(c, d)] - n * means[(c, d)]);
                        }
                    }
                }
                self.frames_seen += 1;
            }
            let occupancy = Array2::from_shape_vec((points.len(), gaussians), snapshot_occupancy)
                .map_err(|e| SpeakerError::InvalidModel {
                problem: e.to_string(),
            })?;
            let centred =
                Array2::from_shape_vec((points.len(), gaussians * dims), snapshot_centred)
                    .map_err(|e| SpeakerError::InvalidModel {
                        problem: e.to_string(),
                    })?;
            let vectors = extractor.ivectors_from_stacked(occupancy.view(), centred.view());
            let mut next_point = 0;
            for i in 0..end - start {
                if next_point < points.len() && points[next_point] == i {
                    self.current.assign(&vectors.row(next_point));
                    next_point += 1;
                }
                out.row_mut(start + i).assign(&self.current);
            }
        }
        Ok(out)
    }

    fn add_frame(&mut self, slot: usize, posteriors: &[f64], frame: &[f64]) {
        let dims = frame.len();
        let kept = self.kept;
        if self.ring_frames.len() < (slot + 1) * dims {
            self.ring_frames.resize((slot + 1) * dims, 0.0);
            self.ring_gaussians.resize((slot + 1) * kept, 0);
            self.ring_posteriors.resize((slot + 1) * kept, 0.0);
        }
        self.ring_frames[slot * dims..(slot + 1) * dims].copy_from_slice(frame);
        let mut stored = 0;
        for (c, &gamma) in posteriors.iter().enumerate() {
            if gamma == 0.0 || stored == kept {
                continue;
            }
            self.occupancy[c] += gamma;
            let mut row = self.first_order.row_mut(c);
            for (f, &v) in row.iter_mut().zip(frame) {
                *f += gamma * v;
            }
            self.ring_gaussians[slot * kept + stored] = c;
            self.ring_posteriors[slot * kept + stored] = gamma;
            stored += 1;
        }
        // Unused entries (posteriors that underflowed to zero) weigh nothing when removed.
        for k in stored..kept {
            self.ring_posteriors[slot * kept + k] = 0.0;
        }
    }

    fn remove_slot(&mut self, slot: usize, dims: usize) {
        let kept = self.kept;
        let frame = &self.ring_frames[slot * dims..(slot + 1) * dims];
        for k in 0..kept {
            let gamma = self.ring_posteriors[slot * kept + k];
            if gamma == 0.0 {
                continue;
            }
            let c = self.ring_gaussians[slot * kept + k];
            self.occupancy[c] -= gamma;
            let mut row = self.first_order.row_mut(c);
            for (f, &v) in row.iter_mut().zip(frame) {
                *f -= gamma * v;
            }
        }
    }
}

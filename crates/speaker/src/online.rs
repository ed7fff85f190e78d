//! Online extraction: a running i-vector over a sliding window, frame-synchronous on a stream.
//!
//! The contract, with W = `window_seconds / frame_shift` frames (rounded, at least 1),
//! K = `period_frames` and s = `frame_stride`: frame t (0-based, counted from the start of the
//! stream) gets the post-processed i-vector of the statistics of the frames
//!
//! ```text
//! { g : max(0, u − W + 1) ≤ g ≤ u and g a multiple of s },   where u = K·⌊t/K⌋
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
//! (two matrix products, in single precision, and one R×R Cholesky factorisation in f64 per
//! point; see [`crate::total_variability::TotalVariability::posterior_means_single`]).

use ndarray::{Array1, Array2, ArrayView2, Axis};

use crate::extractor::{check_frames, IvectorExtractor};
use crate::kernels::{self, Level};
use crate::ubm::{FramePosteriors, BLOCK_FRAMES};
use crate::SpeakerError;

/// Recomputation points solved together at most (see [`OnlineIvectors::push`]).
const POINTS_PER_CHUNK: usize = 64;

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
    /// Entries with a non-zero posterior in the window, per Gaussian: where it drops to 0 the
    /// Gaussian's sums are set to exactly 0 (what subtraction leaves is rounding residue), so
    /// that the solve can skip it.
    entries: Vec<usize>,
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
            entries: vec![0; gaussians],
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
        let means = extractor.ubm.means().as_standard_layout();
        let means = means.as_slice().expect("standard layout");
        let level = Level::detect();
        let stride = extractor.config.frame_stride;
        let mut out = Array2::<f32>::zeros((rows, extractor.output_dimension()));
        // Recomputation points are collected over a chunk of frames and solved together, so that
        // the two products run over many points at once; a chunk holds at most
        // POINTS_PER_CHUNK of them.
        let chunk = (POINTS_PER_CHUNK * self.period).max(BLOCK_FRAMES);
        for chunk_start in (0..rows).step_by(chunk) {
            let chunk_end = (chunk_start + chunk).min(rows);
            // (row in the piece) of every recomputation point in this chunk, and its statistics.
            let mut points: Vec<usize> = Vec::new();
            // In f32: the solve's products are in single precision.
            let mut snapshot_occupancy: Vec<f32> = Vec::new();
            let mut snapshot_centred: Vec<f32> = Vec::new();
            for start in (chunk_start..chunk_end).step_by(BLOCK_FRAMES) {
                let end = (start + BLOCK_FRAMES).min(chunk_end);
                // Only frames on the stride grid (stream index a multiple of s) enter the
                // statistics.
                let first_frame = self.frames_seen;
                let on_grid: Vec<usize> = (start..end)
                    .filter(|&i| (first_frame + i - start).is_multiple_of(stride))
                    .collect();
                let (posteriors, x) = extractor.ubm.frame_posteriors(
                    frames.select(Axis(0), &on_grid).view(),
                    extractor.config.top_gaussians,
                );
                let mut next_on_grid = 0;
                for i in start..end {
                    let frame = self.frames_seen;
                    let slot = frame % self.window;
                    if frame >= self.window && (frame - self.window).is_multiple_of(stride) {
                        self.remove_slot(slot, dims, level);
                    }
                    if frame.is_multiple_of(stride) {
                        let x = x.as_slice().expect("to_f64 builds standard layout");
                        let frame = &x[next_on_grid * dims..(next_on_grid + 1) * dims];
                        self.add_frame(slot, &posteriors, next_on_grid, frame, level);
                        next_on_grid += 1;
                    }
                    if frame.is_multiple_of(self.period) {
                        points.push(i);
                        snapshot_occupancy.extend(self.occupancy.iter().map(|&n| n as f32));
                        // F̃_c = F_c − N_c·μ_c, in f64, rounded once; a Gaussian without entries
                        // has N_c = 0 and F_c = 0 exactly, so F̃_c = 0 (as `resize` leaves it).
                        let offset = snapshot_centred.len();
                        snapshot_centred.resize(offset + gaussians * dims, 0.0);
                        let sums = self
                            .first_order
                            .as_slice()
                            .expect("zeros in standard layout");
                        for (c, out) in snapshot_centred[offset..]
                            .chunks_exact_mut(dims)
                            .enumerate()
                        {
                            if self.entries[c] == 0 {
                                continue;
                            }
                            let n = self.occupancy[c];
                            let range = c * dims..(c + 1) * dims;
                            for ((o, &f), &m) in
                                out.iter_mut().zip(&sums[range.clone()]).zip(&means[range])
                            {
                                *o = (f - n * m) as f32;
                            }
                        }
                    }
                    self.frames_seen += 1;
                }
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
            for i in chunk_start..chunk_end {
                if next_point < points.len() && points[next_point] == i {
                    self.current.assign(&vectors.row(next_point));
                    next_point += 1;
                }
                out.row_mut(i).assign(&self.current);
            }
        }
        Ok(out)
    }

    /// Adds frame `i` of a block (posteriors and values) to the window's sums and keeps it in
    /// `slot`.
    fn add_frame(
        &mut self,
        slot: usize,
        posteriors: &FramePosteriors,
        i: usize,
        frame: &[f64],
        level: Level,
    ) {
        let dims = frame.len();
        let kept = self.kept;
        if self.ring_frames.len() < (slot + 1) * dims {
            self.ring_frames.resize((slot + 1) * dims, 0.0);
            self.ring_gaussians.resize((slot + 1) * kept, 0);
            self.ring_posteriors.resize((slot + 1) * kept, 0.0);
        }
        self.ring_frames[slot * dims..(slot + 1) * dims].copy_from_slice(frame);
        let sums = self
            .first_order
            .as_slice_mut()
            .expect("zeros in standard layout");
        let mut k = slot * kept;
        posteriors.for_each(i, |c, gamma| {
            // A posterior of 0 (a Gaussian far below the frame's best) adds nothing.
            if gamma > 0.0 {
                self.occupancy[c] += gamma;
                kernels::axpy(level, gamma, frame, &mut sums[c * dims..(c + 1) * dims]);
                self.entries[c] += 1;
            }
            self.ring_gaussians[k] = c;
            self.ring_posteriors[k] = gamma;
            k += 1;
        });
    }

    /// Subtracts the frame kept in `slot` from the window's sums.
    fn remove_slot(&mut self, slot: usize, dims: usize, level: Level) {
        let kept = self.kept;
        let frame = &self.ring_frames[slot * dims..(slot + 1) * dims];
        let sums = self
            .first_order
            .as_slice_mut()
            .expect("zeros in standard layout");
        for k in slot * kept..(slot + 1) * kept {
            let (c, gamma) = (self.ring_gaussians[k], self.ring_posteriors[k]);
            if gamma == 0.0 {
                continue;
            }
            let row = &mut sums[c * dims..(c + 1) * dims];
            self.entries[c] -= 1;
            if self.entries[c] == 0 {
                self.occupancy[c] = 0.0;
                row.fill(0.0);
            } else {
                self.occupancy[c] -= gamma;
                kernels::axpy(level, -gamma, frame, row);
            }
        }
    }
}

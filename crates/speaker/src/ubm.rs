//! The universal background model: a diagonal-covariance Gaussian mixture over feature frames,
//! its frame posteriors, Baum–Welch statistics and EM training.
//!
//! For Gaussian c with weight w_c, mean μ_c and variances σ²_c, the weighted log-likelihood of
//! frame x is
//!
//! ```text
//! log w_c + log N(x; μ_c, diag σ²_c)
//!   = g_c + Σ_d x_d·μ_cd/σ²_cd − ½ Σ_d x_d²/σ²_cd,
//! g_c = log w_c − ½ (D log 2π + Σ_d log σ²_cd + Σ_d μ²_cd/σ²_cd),
//! ```
//!
//! so for a block of frames all C values are one matrix product [x, x²]·P (P of shape 2D×C,
//! precomputed) plus g, in f64: the expansion cancels large terms, and f64 keeps the result
//! within 1e-9 of the direct sum on normalised features (checked against scikit-learn).

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, ArrayViewMut1, Axis, Zip};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::config::{UbmConfig, UbmInit};
use crate::kernels::{self, Level, SelectionWork};
use crate::SpeakerError;

/// Frames per block of the matrix products: large enough for an efficient product, small enough
/// that a block's [frames, Gaussians] matrix stays in cache and rayon can balance the work.
pub(crate) const BLOCK_FRAMES: usize = 512;

/// Of a frame's top Gaussians, those whose (f32) log-likelihood is more than this below the best
/// one's get posterior 0, without selection, f64 log-likelihood or exponential: theirs would be
/// below e⁻⁴⁰ ≈ 4·10⁻¹⁸ of the best one's, under the rounding unit of the f64 sums that hold it,
/// so they would not change the statistics beyond rounding.
const NEGLIGIBLE_GAP: f32 = 40.0;

/// A Gaussian with less occupancy than this (in frames) keeps its mean and variances in the M-step.
const MIN_OCCUPANCY: f64 = 1.0;

/// How far (in standard deviations) the two halves of a split Gaussian move apart from its mean.
const SPLIT_OFFSET: f64 = 0.2;

/// A diagonal-covariance Gaussian mixture, with the constants of its log-likelihood precomputed.
#[derive(Debug, Clone, PartialEq)]
pub struct DiagGmm {
    weights: Array1<f64>,
    means: Array2<f64>,
    variances: Array2<f64>,
    /// [2D, C]: rows 0..D hold μ_cd/σ²_cd, rows D..2D hold −1/(2σ²_cd).
    projection: Array2<f64>,
    /// [C]: g_c of the module doc.
    offsets: Array1<f64>,
    /// `[C, 2P]` with P = D rounded up to a multiple of 8: Gaussian c's μ_cd/σ²_cd (then zeros
    /// up to P) and −1/(2σ²_cd) (likewise), what [`kernels::score`] takes.
    rescoring: Vec<f64>,
    /// `projection` and `offsets` in f32, for choosing the top Gaussians of a frame.
    selection: Array2<f32>,
    selection_offsets: Array1<f32>,
}

/// Zeroth- and first-order Baum–Welch statistics of some frames (an utterance, a speaker, a
/// window): N_c = Σ_t γ_t(c) and F_c = Σ_t γ_t(c)·x_t, accumulated in f64. F is not centred;
/// [`BaumWelchStats::centred_first_order`] gives F̃_c = F_c − N_c·μ_c.
#[derive(Debug, Clone, PartialEq)]
pub struct BaumWelchStats {
    /// N: occupancy of each Gaussian, `[gaussians]`.
    pub occupancy: Array1<f64>,
    /// F: posterior-weighted sum of the frames, `[gaussians, dims]`.
    pub first_order: Array2<f64>,
    /// Number of frames summed.
    pub frames: usize,
}

impl BaumWelchStats {
    /// Empty statistics.
    pub fn zeros(gaussians: usize, dims: usize) -> Self {
        BaumWelchStats {
            occupancy: Array1::zeros(gaussians),
            first_order: Array2::zeros((gaussians, dims)),
            frames: 0,
        }
    }

    /// Adds another item's statistics (for example an utterance to its speaker's).
    pub fn add(&mut self, other: &BaumWelchStats) {
        self.occupancy += &other.occupancy;
        self.first_order += &other.first_order;
        self.frames += other.frames;
    }

    /// F̃_c = F_c − N_c·μ_c: the first-order statistics centred on the UBM's means.
    pub fn centred_first_order(&self, ubm: &DiagGmm) -> Array2<f64> {
        &self.first_order - &(&ubm.means * &self.occupancy.view().insert_axis(Axis(1)))
    }
}

/// Sufficient statistics of one EM iteration (N, F and Σγx²) plus the log-likelihood.
struct EmAccumulator {
    occupancy: Array1<f64>,
    first_order: Array2<f64>,
    second_order: Array2<f64>,
    log_likelihood: f64,
    frames: usize,
}

impl EmAccumulator {
    fn zeros(gaussians: usize, dims: usize) -> Self {
        EmAccumulator {
            occupancy: Array1::zeros(gaussians),
            first_order: Array2::zeros((gaussians, dims)),
            second_order: Array2::zeros((gaussians, dims)),
            log_likelihood: 0.0,
            frames: 0,
        }
    }

    fn merge(mut self, other: EmAccumulator) -> Self {
        self.occupancy += &other.occupancy;
        self.first_order += &other.first_order;
        self.second_order += &other.second_order;
        self.log_likelihood += other.log_likelihood;
        self.frames += other.frames;
        self
    }
}

/// Frames as f64, and the [x, x²] matrix the log-likelihood product takes.
fn widen(frames: ArrayView2<f32>) -> (Array2<f64>, Array2<f64>) {
    let (n, dims) = frames.dim();
    let x = to_f64(frames);
    let mut stacked = Array2::<f64>::zeros((n, 2 * dims));
    stacked.slice_mut(s![.., ..dims]).assign(&x);
    Zip::from(stacked.slice_mut(s![.., dims..]))
        .and(&x)
        .for_each(|out, &v| *out = v * v);
    (x, stacked)
}

/// Frames as f64, in standard (row-major) layout whatever the layout of the view.
fn to_f64(frames: ArrayView2<f32>) -> Array2<f64> {
    Array2::from_shape_fn(frames.dim(), |(t, d)| f64::from(frames[(t, d)]))
}

/// Posteriors of a block of frames: of every Gaussian, or of each frame's `top` most likely.
pub(crate) enum FramePosteriors {
    /// `[frames, C]`.
    Dense(Array2<f64>),
    /// Frame i's Gaussians are `gaussians[i·top..(i+1)·top]`, their posteriors `values[…]`.
    /// A frame with fewer Gaussians worth a posterior (see [`NEGLIGIBLE_GAP`]) is padded with
    /// repeats of one of them with posterior 0.
    Sparse {
        /// Gaussians kept per frame.
        top: usize,
        /// Indices of the kept Gaussians.
        gaussians: Vec<usize>,
        /// Their posteriors (summing to 1 per frame).
        values: Vec<f64>,
    },
}

impl FramePosteriors {
    /// Calls `f(c, γ)` for every Gaussian c with a posterior γ on frame `i`.
    pub(crate) fn for_each(&self, i: usize, mut f: impl FnMut(usize, f64)) {
        match self {
            FramePosteriors::Dense(matrix) => {
                for (c, &gamma) in matrix.row(i).iter().enumerate() {
                    f(c, gamma);
                }
            }
            FramePosteriors::Sparse {
                top,
                gaussians,
                values,
            } => {
                for k in i * top..(i + 1) * top {
                    f(gaussians[k], values[k]);
                }
            }
        }
    }
}

impl DiagGmm {
    /// A mixture from its weights `[C]`, means `[C, D]` and variances `[C, D]`. Weights must be
    /// positive and sum to 1 (within 1e-6), variances positive, everything finite.
    pub fn new(
        weights: Array1<f64>,
        means: Array2<f64>,
        variances: Array2<f64>,
    ) -> Result<DiagGmm, SpeakerError> {
        let invalid = |problem: String| SpeakerError::InvalidModel { problem };
        let (gaussians, dims) = means.dim();
        if gaussians == 0 || dims == 0 {
            return Err(invalid(format!(
                "a Gaussian mixture needs at least one Gaussian and one dimension, found means of shape [{gaussians}, {dims}]"
            )));
        }
        if weights.len() != gaussians || variances.dim() != (gaussians, dims) {
            return Err(invalid(format!(
                "weights [{}] and variances {:?} do not match means [{gaussians}, {dims}]",
                weights.len(),
                variances.shape()
            )));
        }
        if let Some((c, w)) = weights
            .iter()
            .enumerate()
            .find(|(_, w)| !(**w > 0.0 && w.is_finite()))
        {
            return Err(invalid(format!(
                "weight of Gaussian {c} is {w}, expected a positive number"
            )));
        }
        let total: f64 = weights.sum();
        if (total - 1.0).abs() > 1e-6 {
            return Err(invalid(format!("weights sum to {total}, expected 1")));
        }
        if let Some(((c, d), v)) = variances
            .indexed_iter()
            .find(|(_, v)| !(**v > 0.0 && v.is_finite()))
        {
            return Err(invalid(format!(
                "variance of Gaussian {c}, dimension {d} is {v}, expected a positive number"
            )));
        }
        if let Some(((c, d), m)) = means.indexed_iter().find(|(_, m)| !m.is_finite()) {
            return Err(invalid(format!(
                "mean of Gaussian {c}, dimension {d} is {m}, expected a finite number"
            )));
        }
        let mut projection = Array2::<f64>::zeros((2 * dims, gaussians));
        let mut offsets = Array1::<f64>::zeros(gaussians);
        let log_two_pi = (2.0 * std::f64::consts::PI).ln();
        for c in 0..gaussians {
            let mut constant = weights[c].ln() - 0.5 * dims as f64 * log_two_pi;
            for d in 0..dims {
                let (mean, variance) = (means[(c, d)], variances[(c, d)]);
                projection[(d, c)] = mean / variance;
                projection[(dims + d, c)] = -0.5 / variance;
                constant -= 0.5 * (variance.ln() + mean * mean / variance);
            }
            offsets[c] = constant;
        }
        Ok(DiagGmm {
            weights,
            means,
            variances,
            rescoring: {
                let stride = kernels::padded(dims);
                let mut rescoring = vec![0.0; gaussians * 2 * stride];
                for (c, weights) in rescoring.chunks_exact_mut(2 * stride).enumerate() {
                    for d in 0..dims {
                        weights[d] = projection[(d, c)];
                        weights[stride + d] = projection[(dims + d, c)];
                    }
                }
                rescoring
            },
            selection: projection.mapv(|v| v as f32),
            selection_offsets: offsets.mapv(|v| v as f32),
            projection,
            offsets,
        })
    }

    /// Number of Gaussians C.
    pub fn gaussians(&self) -> usize {
        self.weights.len()
    }

    /// Feature dimension D.
    pub fn dims(&self) -> usize {
        self.means.ncols()
    }

    /// Mixture weights `[C]`.
    pub fn weights(&self) -> &Array1<f64> {
        &self.weights
    }

    /// Means `[C, D]`.
    pub fn means(&self) -> &Array2<f64> {
        &self.means
    }

    /// Diagonal variances `[C, D]`.
    pub fn variances(&self) -> &Array2<f64> {
        &self.variances
    }

    /// log w_c + log N(x_t; μ_c, σ²_c) for every frame and Gaussian, `[frames, C]`. The caller
    /// guarantees `frames` has D columns.
    pub fn weighted_log_likelihoods(&self, frames: ArrayView2<f32>) -> Array2<f64> {
        let (_, stacked) = widen(frames);
        self.weighted_log_likelihoods_stacked(stacked.view())
    }

    fn weighted_log_likelihoods_stacked(&self, stacked: ArrayView2<f64>) -> Array2<f64> {
        let mut scores = stacked.dot(&self.projection);
        scores += &self.offsets;
        scores
    }

    /// Per-frame log-likelihood log Σ_c w_c N(x_t; μ_c, σ²_c), `[frames]`.
    pub fn log_likelihoods(&self, frames: ArrayView2<f32>) -> Array1<f64> {
        let mut scores = self.weighted_log_likelihoods(frames);
        scores
            .rows_mut()
            .into_iter()
            .map(posteriors_in_place)
            .collect()
    }

    /// Posterior of every Gaussian for every frame, `[frames, C]`. With 0 < `top` < C only the
    /// `top` most likely Gaussians of each frame get a posterior (renormalised among them), the
    /// others get 0; see [`DiagGmm::statistics`] for how they are chosen.
    pub fn posteriors(&self, frames: ArrayView2<f32>, top: usize) -> Array2<f64> {
        let mut out = Array2::<f64>::zeros((frames.nrows(), self.gaussians()));
        for (start, block) in (0..frames.nrows())
            .step_by(BLOCK_FRAMES)
            .zip(blocks(&[frames]))
        {
            let (posteriors, _) = self.frame_posteriors(block, top);
            for i in 0..block.nrows() {
                // Padding entries repeat a kept Gaussian with posterior 0: add, not assign.
                posteriors.for_each(i, |c, gamma| out[(start + i, c)] += gamma);
            }
        }
        out
    }

    /// Dense posteriors of a block of frames given as the [x, x²] matrix, and the block's summed
    /// log-likelihood.
    fn dense_posteriors(&self, stacked: ArrayView2<f64>) -> (Array2<f64>, f64) {
        let mut scores = self.weighted_log_likelihoods_stacked(stacked);
        let mut log_likelihood = 0.0;
        for row in scores.rows_mut() {
            log_likelihood += posteriors_in_place(row);
        }
        (scores, log_likelihood)
    }

    /// Posteriors of a block of frames (all Gaussians, or the `top` of each frame) and the frames
    /// widened to f64.
    ///
    /// With 0 < `top` < C the Gaussians are chosen by an f32 product (half the cost of the f64
    /// one, and no exponential for the others); only the chosen ones get their log-likelihood in
    /// f64, from which their posteriors are computed. f32 rounding can only swap Gaussians whose
    /// log-likelihoods tie to about 1e-5.
    pub(crate) fn frame_posteriors(
        &self,
        frames: ArrayView2<f32>,
        top: usize,
    ) -> (FramePosteriors, Array2<f64>) {
        let (gaussians, dims) = (self.gaussians(), self.dims());
        if top == 0 || top >= gaussians {
            let (x, stacked) = widen(frames);
            let (posteriors, _) = self.dense_posteriors(stacked.view());
            return (FramePosteriors::Dense(posteriors), x);
        }
        let level = Level::detect();
        let x = to_f64(frames);
        let mut stacked = Array2::<f32>::zeros((frames.nrows(), 2 * dims));
        for (mut out, frame) in stacked.rows_mut().into_iter().zip(frames.rows()) {
            for (d, &v) in frame.iter().enumerate() {
                out[d] = v;
                out[dims + d] = v * v;
            }
        }
        let mut approximate = stacked.dot(&self.selection);
        approximate += &self.selection_offsets;
        let mut chosen = Vec::with_capacity(gaussians);
        let mut work = SelectionWork::default();
        let mut kept = Vec::with_capacity(frames.nrows() * top);
        let mut values = Vec::with_capacity(frames.nrows() * top);
        let stride = 2 * kernels::padded(dims);
        let weights = |c: usize| &self.rescoring[stride * c..stride * (c + 1)];
        for (row, frame) in approximate.rows().into_iter().zip(
            x.as_slice()
                .expect("to_f64 builds standard layout")
                .chunks_exact(dims),
        ) {
            let first = values.len();
            kernels::select_top(
                level,
                row.as_slice().expect("a product in standard layout"),
                top,
                NEGLIGIBLE_GAP,
                &mut chosen,
                &mut work,
            );
            for &(_, c) in &chosen {
                kept.push(c);
                values.push(kernels::score(level, self.offsets[c], frame, weights(c)));
            }
            if chosen.is_empty() {
                // Only when no f32 score is finite (features so large that the f32 product
                // overflows): choose by the f64 scores instead.
                let mut exact: Vec<(f64, usize)> = (0..gaussians)
                    .map(|c| (kernels::score(level, self.offsets[c], frame, weights(c)), c))
                    .collect();
                exact.sort_by(|a, b| b.0.total_cmp(&a.0));
                for &(score, c) in exact.iter().take(top) {
                    kept.push(c);
                    values.push(score);
                }
            }
            // Every frame has `top` entries; the rest are padding with posterior 0 (−∞ here).
            let padding = top - (values.len() - first);
            kept.extend(std::iter::repeat_n(kept[first], padding));
            values.extend(std::iter::repeat_n(f64::NEG_INFINITY, padding));
            sparse_posteriors_in_place(&mut values[first..]);
        }
        (
            FramePosteriors::Sparse {
                top,
                gaussians: kept,
                values,
            },
            x,
        )
    }

    /// Baum–Welch statistics of `frames`. With 0 < `top` < C only each frame's `top` most likely
    /// Gaussians count (posteriors renormalised among them): the statistics then cost `top` rows
    /// per frame instead of C, and the exponentials and f64 log-likelihoods of the other Gaussians
    /// are skipped (see [`DiagGmm::posteriors`]). The caller guarantees `frames` has D columns.
    pub fn statistics(&self, frames: ArrayView2<f32>, top: usize) -> BaumWelchStats {
        let dims = self.dims();
        let mut stats = BaumWelchStats::zeros(self.gaussians(), dims);
        for block in blocks(&[frames]) {
            let (posteriors, x) = self.frame_posteriors(block, top);
            match &posteriors {
                FramePosteriors::Dense(matrix) => {
                    stats.occupancy += &matrix.sum_axis(Axis(0));
                    stats.first_order += &matrix.t().dot(&x);
                }
                FramePosteriors::Sparse { .. } => {
                    let level = Level::detect();
                    let occupancy = &mut stats.occupancy;
                    let first_order = stats
                        .first_order
                        .as_slice_mut()
                        .expect("zeros in standard layout");
                    let x = x.as_slice().expect("to_f64 builds standard layout");
                    for (i, frame) in x.chunks_exact(dims).enumerate() {
                        posteriors.for_each(i, |c, gamma| {
                            if gamma > 0.0 {
                                occupancy[c] += gamma;
                                kernels::axpy(
                                    level,
                                    gamma,
                                    frame,
                                    &mut first_order[c * dims..(c + 1) * dims],
                                );
                            }
                        });
                    }
                }
            }
            stats.frames += block.nrows();
        }
        stats
    }

    fn accumulate(&self, block: ArrayView2<f32>) -> EmAccumulator {
        let (x, stacked) = widen(block);
        let (posteriors, log_likelihood) = self.dense_posteriors(stacked.view());
        let dims = self.dims();
        EmAccumulator {
            occupancy: posteriors.sum_axis(Axis(0)),
            first_order: posteriors.t().dot(&x),
            second_order: posteriors.t().dot(&stacked.slice(s![.., dims..])),
            log_likelihood,
            frames: block.nrows(),
        }
    }

    /// One EM iteration on `frames` (any number of matrices with D columns): the E-step under
    /// this mixture, then the M-step
    ///
    /// ```text
    /// n_c = N_c + 10ε,  w_c = n_c / Σ n,  μ_c = F_c / n_c,
    /// σ²_cd = max(S_cd / n_c − μ²_cd, floor_d) + regularization
    /// ```
    ///
    /// (S = Σ γ x², ε the f64 machine epsilon: scikit-learn's `GaussianMixture` M-step with
    /// `reg_covar = regularization`, plus the floor). A Gaussian with occupancy below one frame
    /// keeps its mean and variances. Returns the new mixture and the log-likelihood per frame
    /// of the frames under *this* mixture.
    pub fn em_iteration(
        &self,
        frames: &[ArrayView2<f32>],
        floor: ArrayView1<f64>,
        regularization: f64,
    ) -> Result<(DiagGmm, f64), SpeakerError> {
        let accumulator = self.accumulate_all(frames);
        let per_frame = accumulator.log_likelihood / accumulator.frames.max(1) as f64;
        Ok((
            self.maximize(&accumulator, floor, regularization)?,
            per_frame,
        ))
    }

    fn accumulate_all(&self, frames: &[ArrayView2<f32>]) -> EmAccumulator {
        let (gaussians, dims) = (self.gaussians(), self.dims());
        blocks(frames)
            .par_iter()
            .map(|block| self.accumulate(block.view()))
            .reduce(
                || EmAccumulator::zeros(gaussians, dims),
                EmAccumulator::merge,
            )
    }

    fn maximize(
        &self,
        accumulator: &EmAccumulator,
        floor: ArrayView1<f64>,
        regularization: f64,
    ) -> Result<DiagGmm, SpeakerError> {
        let (gaussians, dims) = (self.gaussians(), self.dims());
        // scikit-learn adds 10·eps to every occupancy so that no weight is exactly zero.
        let occupancy = accumulator.occupancy.mapv(|n| n + 10.0 * f64::EPSILON);
        let mut means = self.means.clone();
        let mut variances = self.variances.clone();
        for c in 0..gaussians {
            let n = occupancy[c];
            if n < MIN_OCCUPANCY {
                continue;
            }
            for d in 0..dims {
                let mean = accumulator.first_order[(c, d)] / n;
                let variance = (accumulator.second_order[(c, d)] / n - mean * mean).max(floor[d])
                    + regularization;
                means[(c, d)] = mean;
                if variance > 0.0 && variance.is_finite() {
                    variances[(c, d)] = variance;
                }
            }
        }
        let weights = &occupancy / occupancy.sum();
        DiagGmm::new(weights, means, variances)
    }

    /// Splits Gaussians until there are `target` of them: the heaviest first, each into two with
    /// half its weight and means μ ± 0.2σ.
    fn split(&self, target: usize) -> Result<DiagGmm, SpeakerError> {
        let gaussians = self.gaussians();
        let splits = (target - gaussians).min(gaussians);
        let mut order: Vec<usize> = (0..gaussians).collect();
        order.sort_by(|&a, &b| self.weights[b].total_cmp(&self.weights[a]).then(a.cmp(&b)));
        let dims = self.dims();
        let mut weights = self.weights.to_vec();
        let mut means = self.means.clone();
        let mut variances = self.variances.clone();
        let mut new_means = Vec::new();
        let mut new_variances = Vec::new();
        for &c in &order[..splits] {
            weights[c] *= 0.5;
            weights.push(weights[c]);
            for d in 0..dims {
                let offset = SPLIT_OFFSET * self.variances[(c, d)].sqrt();
                new_means.push(self.means[(c, d)] - offset);
                means[(c, d)] += offset;
                new_variances.push(self.variances[(c, d)]);
            }
        }
        let added_means = Array2::from_shape_vec((splits, dims), new_means).map_err(|e| {
            SpeakerError::InvalidModel {
                problem: e.to_string(),
            }
        })?;
        let added_variances =
            Array2::from_shape_vec((splits, dims), new_variances).map_err(|e| {
                SpeakerError::InvalidModel {
                    problem: e.to_string(),
                }
            })?;
        means
            .append(Axis(0), added_means.view())
            .and_then(|_| variances.append(Axis(0), added_variances.view()))
            .map_err(|e| SpeakerError::InvalidModel {
                problem: e.to_string(),
            })?;
        DiagGmm::new(Array1::from(weights), means, variances)
    }
}

/// Turns a row of weighted log-likelihoods into posteriors in place and returns its
/// log-sum-exp.
/// [`posteriors_in_place`] for a frame's kept Gaussians, where −∞ marks one whose posterior is
/// 0 (no exponential for those).
fn sparse_posteriors_in_place(values: &mut [f64]) {
    let max = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut sum = 0.0;
    for v in values.iter_mut() {
        *v = if *v == f64::NEG_INFINITY {
            0.0
        } else {
            (*v - max).exp()
        };
        sum += *v;
    }
    values.iter_mut().for_each(|v| *v /= sum);
}

fn posteriors_in_place(mut row: ArrayViewMut1<f64>) -> f64 {
    let max = row.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut sum = 0.0;
    for v in row.iter_mut() {
        *v = (*v - max).exp();
        sum += *v;
    }
    row.mapv_inplace(|v| v / sum);
    max + sum.ln()
}

/// Views of at most [`BLOCK_FRAMES`] frames covering all of `frames`.
pub(crate) fn blocks<'a>(frames: &[ArrayView2<'a, f32>]) -> Vec<ArrayView2<'a, f32>> {
    let mut out = Vec::new();
    for matrix in frames {
        let rows = matrix.nrows();
        for start in (0..rows).step_by(BLOCK_FRAMES) {
            out.push(matrix.slice_move(s![start..(start + BLOCK_FRAMES).min(rows), ..]));
        }
    }
    out
}

/// Global mean and (biased) variance of every dimension, in f64.
fn global_moments(frames: &[ArrayView2<f32>], dims: usize) -> (Array1<f64>, Array1<f64>, usize) {
    let (sum, square, count) = blocks(frames)
        .par_iter()
        .map(|block| {
            let x = block.mapv(f64::from);
            (
                x.sum_axis(Axis(0)),
                (&x * &x).sum_axis(Axis(0)),
                block.nrows(),
            )
        })
        .reduce(
            || (Array1::zeros(dims), Array1::zeros(dims), 0),
            |a, b| (a.0 + b.0, a.1 + b.1, a.2 + b.2),
        );
    let n = count.max(1) as f64;
    let mean = sum / n;
    let variance = square / n - &mean * &mean;
    (mean, variance, count)
}

/// What UBM training reports after each step.
#[derive(Debug, Clone, PartialEq)]
pub enum UbmStep {
    /// One EM iteration: the log-likelihood per frame of the training frames under the mixture
    /// the iteration started from.
    Em {
        /// Gaussians in the mixture.
        gaussians: usize,
        /// Log-likelihood per frame before this iteration's M-step.
        log_likelihood: f64,
    },
    /// One Lloyd iteration of k-means initialisation: mean squared distance of the frames to
    /// their nearest centre before the update.
    Kmeans {
        /// Mean squared Euclidean distance per frame.
        mean_squared_distance: f64,
    },
}

/// Steps [`train_ubm`] takes: EM iterations (and Lloyd iterations), for a progress bar.
pub fn ubm_steps(config: &UbmConfig) -> usize {
    let init = match config.init {
        UbmInit::Kmeans => config.init_iterations,
        UbmInit::Split => {
            let mut rounds = 0;
            let mut gaussians = 1;
            while gaussians < config.gaussians {
                gaussians = (2 * gaussians).min(config.gaussians);
                rounds += 1;
            }
            rounds * config.init_iterations
        }
    };
    init + config.iterations
}

/// Trains the UBM on the frames of `utterances` (each `[frames, D]`, already checked to be finite
/// and of D columns) as `config` says, reporting every step. Returns the mixture and the
/// log-likelihood per frame of each EM iteration in order.
pub fn train_ubm(
    config: &UbmConfig,
    utterances: &[ArrayView2<f32>],
    progress: &mut dyn FnMut(UbmStep),
) -> Result<(DiagGmm, Vec<f64>), SpeakerError> {
    config.validate()?;
    let dims = utterances.first().map_or(0, |u| u.ncols());
    let total: usize = utterances.iter().map(|u| u.nrows()).sum();
    if total < config.gaussians {
        return Err(SpeakerError::Training {
            problem: format!(
                "{total} training frames for a UBM of {} Gaussians (setting `ubm.gaussians`); at least as many frames as Gaussians are needed",
                config.gaussians
            ),
        });
    }
    let thinned;
    let pool: Vec<ArrayView2<f32>> = if config.max_frames > 0 && total > config.max_frames {
        let stride = total.div_ceil(config.max_frames);
        let mut rows = Vec::with_capacity(total / stride + 1);
        let mut index = 0usize;
        for utterance in utterances {
            for row in utterance.rows() {
                if index.is_multiple_of(stride) {
                    rows.extend(row.iter().copied());
                }
                index += 1;
            }
        }
        thinned = Array2::from_shape_vec((rows.len() / dims, dims), rows).map_err(|e| {
            SpeakerError::Training {
                problem: e.to_string(),
            }
        })?;
        vec![thinned.view()]
    } else {
        utterances.to_vec()
    };
    let (mean, variance, _) = global_moments(&pool, dims);
    if let Some((d, _)) = variance
        .iter()
        .enumerate()
        .find(|(_, v)| !(**v > 0.0 && v.is_finite()))
    {
        return Err(SpeakerError::Training {
            problem: format!(
                "feature dimension {d} has the same value in every training frame; the UBM needs variation in every dimension"
            ),
        });
    }
    let floor = &variance * config.variance_floor;
    let regularization = config.variance_regularization;
    let mut log_likelihoods = Vec::new();
    let mut gmm = match config.init {
        UbmInit::Split => {
            let mut gmm = DiagGmm::new(
                Array1::ones(1),
                mean.clone().insert_axis(Axis(0)),
                variance.clone().insert_axis(Axis(0)),
            )?;
            while gmm.gaussians() < config.gaussians {
                gmm = gmm.split((2 * gmm.gaussians()).min(config.gaussians))?;
                for _ in 0..config.init_iterations {
                    let (next, log_likelihood) =
                        gmm.em_iteration(&pool, floor.view(), regularization)?;
                    progress(UbmStep::Em {
                        gaussians: gmm.gaussians(),
                        log_likelihood,
                    });
                    log_likelihoods.push(log_likelihood);
                    gmm = next;
                }
            }
            gmm
        }
        UbmInit::Kmeans => kmeans_init(config, &pool, &variance, floor.view(), progress)?,
    };
    for _ in 0..config.iterations {
        let (next, log_likelihood) = gmm.em_iteration(&pool, floor.view(), regularization)?;
        progress(UbmStep::Em {
            gaussians: gmm.gaussians(),
            log_likelihood,
        });
        log_likelihoods.push(log_likelihood);
        gmm = next;
    }
    Ok((gmm, log_likelihoods))
}

/// Frames seeding k-means++ at most (a regular subsample of the pool).
const KMEANS_SEEDING_FRAMES: usize = 50_000;

/// k-means++ seeding on a subsample, Lloyd iterations on the pool, then one Gaussian per cluster.
fn kmeans_init(
    config: &UbmConfig,
    pool: &[ArrayView2<f32>],
    global_variance: &Array1<f64>,
    floor: ArrayView1<f64>,
    progress: &mut dyn FnMut(UbmStep),
) -> Result<DiagGmm, SpeakerError> {
    let dims = global_variance.len();
    let gaussians = config.gaussians;
    let total: usize = pool.iter().map(|p| p.nrows()).sum();
    let stride = total.div_ceil(KMEANS_SEEDING_FRAMES).max(1);
    let mut sample: Vec<Array1<f64>> = Vec::new();
    let mut index = 0usize;
    for matrix in pool {
        for row in matrix.rows() {
            if index.is_multiple_of(stride) {
                sample.push(row.mapv(f64::from));
            }
            index += 1;
        }
    }
    let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
    let mut centres = Array2::<f64>::zeros((gaussians, dims));
    centres
        .row_mut(0)
        .assign(&sample[rng.random_range(0..sample.len())]);
    let distance = |a: &Array1<f64>, b: ArrayView1<f64>| -> f64 {
        a.iter().zip(b.iter()).map(|(x, y)| (x - y) * (x - y)).sum()
    };
    let mut nearest: Vec<f64> = sample.iter().map(|x| distance(x, centres.row(0))).collect();
    for k in 1..gaussians {
        // k-means++: the next centre is a frame drawn with probability ∝ squared distance to the
        // nearest centre chosen so far.
        let sum: f64 = nearest.iter().sum();
        let chosen = if sum > 0.0 {
            let mut target = rng.random_range(0.0..sum);
            let mut chosen = nearest.len() - 1;
            for (i, d) in nearest.iter().enumerate() {
                if target < *d {
                    chosen = i;
                    break;
                }
                target -= d;
            }
            chosen
        } else {
            rng.random_range(0..sample.len())
        };
        centres.row_mut(k).assign(&sample[chosen]);
        for (x, best) in sample.iter().zip(nearest.iter_mut()) {
            *best = best.min(distance(x, centres.row(k)));
        }
    }
    let mut counts = Array1::<f64>::zeros(gaussians);
    let mut sums = Array2::<f64>::zeros((gaussians, dims));
    let mut squares = Array2::<f64>::zeros((gaussians, dims));
    for iteration in 0..=config.init_iterations {
        let squared_norms: Array1<f64> = centres.rows().into_iter().map(|c| c.dot(&c)).collect();
        let (c_counts, c_sums, c_squares, distortion) = blocks(pool)
            .par_iter()
            .map(|block| {
                let x = block.mapv(f64::from);
                // ‖x − c‖² = ‖x‖² − 2x·c + ‖c‖²: one product for the whole block.
                let cross = x.dot(&centres.t());
                let mut counts = Array1::<f64>::zeros(gaussians);
                let mut sums = Array2::<f64>::zeros((gaussians, dims));
                let mut squares = Array2::<f64>::zeros((gaussians, dims));
                let mut distortion = 0.0;
                for (t, row) in x.rows().into_iter().enumerate() {
                    let norm = row.dot(&row);
                    let (best, best_distance) = (0..gaussians)
                        .map(|k| (k, norm - 2.0 * cross[(t, k)] + squared_norms[k]))
                        .fold((0, f64::INFINITY), |a, b| if b.1 < a.1 { b } else { a });
                    distortion += best_distance.max(0.0);
                    counts[best] += 1.0;
                    let mut sum = sums.row_mut(best);
                    sum += &row;
                    let mut square = squares.row_mut(best);
                    Zip::from(&mut square)
                        .and(&row)
                        .for_each(|s, &v| *s += v * v);
                }
                (counts, sums, squares, distortion)
            })
            .reduce(
                || {
                    (
                        Array1::zeros(gaussians),
                        Array2::zeros((gaussians, dims)),
                        Array2::zeros((gaussians, dims)),
                        0.0,
                    )
                },
                |a, b| (a.0 + b.0, a.1 + b.1, a.2 + b.2, a.3 + b.3),
            );
        counts = c_counts;
        sums = c_sums;
        squares = c_squares;
        if iteration == config.init_iterations {
            break;
        }
        progress(UbmStep::Kmeans {
            mean_squared_distance: distortion / total as f64,
        });
        for k in 0..gaussians {
            if counts[k] > 0.0 {
                let mut centre = centres.row_mut(k);
                centre.assign(&(&sums.row(k) / counts[k]));
            }
        }
    }
    let mut variances = Array2::<f64>::zeros((gaussians, dims));
    for k in 0..gaussians {
        for d in 0..dims {
            variances[(k, d)] = if counts[k] >= 2.0 {
                let mean = sums[(k, d)] / counts[k];
                (squares[(k, d)] / counts[k] - mean * mean).max(floor[d])
            } else {
                global_variance[d]
            };
            if !(variances[(k, d)] > 0.0 && variances[(k, d)].is_finite()) {
                variances[(k, d)] = global_variance[d];
            }
        }
        if counts[k] > 0.0 {
            let mut centre = centres.row_mut(k);
            centre.assign(&(&sums.row(k) / counts[k]));
        }
    }
    // Every cluster keeps a weight: an empty one would have log-weight −∞.
    let weights = counts.mapv(|n| n.max(1.0));
    let weights = &weights / weights.sum();
    DiagGmm::new(weights, centres, variances)
}

#[cfg(test)]
mod tests {
    use super::*;

    pub(crate) fn toy_gmm() -> DiagGmm {
        DiagGmm::new(
            ndarray::arr1(&[0.5, 0.3, 0.2]),
            ndarray::arr2(&[[0.0, 1.0], [2.0, -1.0], [-1.5, 0.5]]),
            ndarray::arr2(&[[1.0, 0.5], [0.3, 2.0], [0.8, 0.8]]),
        )
        .unwrap()
    }

    /// The definition: log w_c − ½ Σ_d (log 2πσ²_cd + (x_d − μ_cd)²/σ²_cd), term by term.
    fn slow_weighted_log_likelihood(gmm: &DiagGmm, x: &[f32], c: usize) -> f64 {
        let mut value = gmm.weights[c].ln();
        for (d, &v) in x.iter().enumerate() {
            let variance = gmm.variances[(c, d)];
            let diff = f64::from(v) - gmm.means[(c, d)];
            value -= 0.5 * ((2.0 * std::f64::consts::PI * variance).ln() + diff * diff / variance);
        }
        value
    }

    fn toy_frames(n: usize, seed: u64) -> Array2<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        Array2::from_shape_fn((n, 2), |_| rng.random_range(-3.0f32..3.0))
    }

    #[test]
    fn product_form_equals_the_definition() {
        let gmm = toy_gmm();
        let frames = toy_frames(1100, 1);
        let fast = gmm.weighted_log_likelihoods(frames.view());
        for (t, row) in frames.rows().into_iter().enumerate() {
            for c in 0..3 {
                let slow = slow_weighted_log_likelihood(&gmm, row.as_slice().unwrap(), c);
                assert!(
                    (fast[(t, c)] - slow).abs() < 1e-12,
                    "frame {t}, Gaussian {c}"
                );
            }
        }
        let posteriors = gmm.posteriors(frames.view(), 0);
        for row in posteriors.rows() {
            assert!((row.sum() - 1.0).abs() < 1e-12);
        }
    }

    #[test]
    fn top_n_keeps_the_largest_posteriors_renormalised() {
        let gmm = toy_gmm();
        let frames = toy_frames(50, 2);
        let full = gmm.posteriors(frames.view(), 0);
        let pruned = gmm.posteriors(frames.view(), 2);
        for (a, b) in full.rows().into_iter().zip(pruned.rows()) {
            let smallest = (0..3).min_by(|&i, &j| a[i].total_cmp(&a[j])).unwrap();
            assert_eq!(b[smallest], 0.0);
            let kept = 1.0 - a[smallest];
            for c in (0..3).filter(|&c| c != smallest) {
                assert!((b[c] - a[c] / kept).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn top_gaussians_far_below_the_best_get_posterior_zero() {
        // One dimension, unit variances, equal weights: frame x scores −(x − μ_c)²/2 + const.
        let gmm = DiagGmm::new(
            ndarray::arr1(&[0.25, 0.25, 0.25, 0.25]),
            ndarray::arr2(&[[0.0], [1.0], [8.0], [9.5]]),
            ndarray::arr2(&[[1.0], [1.0], [1.0], [1.0]]),
        )
        .unwrap();
        // At x = 0 the top three are μ = 0, 1 and 8; μ = 8 scores 32 below the best (within
        // the gap of 40), and at x = −1.5 it scores 44 below (outside it).
        let frames = ndarray::arr2(&[[0.0f32], [-1.5]]);
        let full = gmm.posteriors(frames.view(), 0);
        let pruned = gmm.posteriors(frames.view(), 3);
        assert!(pruned[(0, 2)] > 0.0);
        let kept = full[(0, 0)] + full[(0, 1)] + full[(0, 2)];
        for c in 0..3 {
            assert!((pruned[(0, c)] - full[(0, c)] / kept).abs() < 1e-15);
        }
        assert_eq!(pruned[(1, 2)], 0.0);
        assert_eq!(pruned[(1, 3)], 0.0);
        let kept = full[(1, 0)] + full[(1, 1)];
        for c in 0..2 {
            assert!((pruned[(1, c)] - full[(1, c)] / kept).abs() < 1e-15);
        }
        assert!((pruned.row(1).sum() - 1.0).abs() < 1e-15);
    }

    #[test]
    fn statistics_equal_the_sums_over_frames() {
        let gmm = toy_gmm();
        let frames = toy_frames(1300, 3);
        let stats = gmm.statistics(frames.view(), 0);
        let posteriors = gmm.posteriors(frames.view(), 0);
        assert_eq!(stats.frames, 1300);
        for c in 0..3 {
            let occupancy: f64 = posteriors.column(c).sum();
            assert!((stats.occupancy[c] - occupancy).abs() < 1e-9);
            for d in 0..2 {
                let first: f64 = (0..1300)
                    .map(|t| posteriors[(t, c)] * f64::from(frames[(t, d)]))
                    .sum();
                assert!((stats.first_order[(c, d)] - first).abs() < 1e-9);
            }
        }
        let centred = stats.centred_first_order(&gmm);
        assert!(
            (centred[(1, 0)] - (stats.first_order[(1, 0)] - stats.occupancy[1] * 2.0)).abs()
                < 1e-12
        );
    }

    #[test]
    fn training_raises_the_log_likelihood_every_iteration() {
        // Frames drawn from the toy mixture itself.
        let truth = toy_gmm();
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let frames = Array2::from_shape_fn((3000, 2), |_| 0.0f32);
        let mut frames = frames;
        for mut row in frames.rows_mut() {
            let u: f64 = rng.random_range(0.0..1.0);
            let c = if u < 0.5 {
                0
            } else if u < 0.8 {
                1
            } else {
                2
            };
            for d in 0..2 {
                let z: f64 = (-2.0 * rng.random_range(1e-12f64..1.0).ln()).sqrt()
                    * (2.0 * std::f64::consts::PI * rng.random_range(0.0..1.0)).cos();
                row[d] = (truth.means[(c, d)] + z * truth.variances[(c, d)].sqrt()) as f32;
            }
        }
        for init in [UbmInit::Split, UbmInit::Kmeans] {
            let config = UbmConfig {
                gaussians: 3,
                iterations: 15,
                init,
                init_iterations: 4,
                ..UbmConfig::default()
            };
            let mut steps = 0;
            let (gmm, log_likelihoods) =
                train_ubm(&config, &[frames.view()], &mut |_| steps += 1).unwrap();
            assert_eq!(steps, ubm_steps(&config));
            let last = &log_likelihoods[log_likelihoods.len() - config.iterations..];
            for pair in last.windows(2) {
                assert!(pair[1] >= pair[0] - 1e-12, "{init:?}: {last:?}");
            }
            // The true mixture's log-likelihood is a bound EM should reach closely.
            let true_log_likelihood = truth.log_likelihoods(frames.view()).mean().unwrap();
            let ours = gmm.log_likelihoods(frames.view()).mean().unwrap();
            assert!(
                ours > true_log_likelihood - 0.01,
                "{init:?}: {ours} vs {true_log_likelihood}"
            );
        }
    }

    #[test]
    fn constant_dimension_and_too_few_frames_are_clear_errors() {
        let frames = Array2::from_shape_fn((100, 2), |(t, d)| if d == 0 { t as f32 } else { 3.0 });
        let error = train_ubm(
            &UbmConfig {
                gaussians: 4,
                ..UbmConfig::default()
            },
            &[frames.view()],
            &mut |_| {},
        )
        .unwrap_err()
        .to_string();
        assert!(
            error.contains("dimension 1") && error.contains("same value"),
            "{error}"
        );
        let error = train_ubm(&UbmConfig::default(), &[frames.view()], &mut |_| {})
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("100 training frames") && error.contains("128"),
            "{error}"
        );
    }
}

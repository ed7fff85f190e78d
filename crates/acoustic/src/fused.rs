//! One TDNN layer as a single candle operation with a hand-written backward pass.
//!
//! Written with tensor primitives, a hidden layer is a matrix product followed by about fifteen
//! element-wise operations (shift-add of the per-offset blocks, bias, ReLU, the steps of the
//! normalisation, the dropout mask), each allocating a tensor of the layer's output size, and
//! twice as many in the backward pass. Here the layer is one [`CustomOp3`] over
//! `(input, weight, params)`:
//!
//! * the splice is never materialised: for offset `k` the rows `s·t + c_k` of the input are a
//!   strided view (row stride `s·D`), so `z = Σ_k X_k · W_k` is `K` matrix products accumulating
//!   into one `[rows, H]` buffer (`W_k` is the `k`-th column block of the stored
//!   `[D, K·H]` weight). With subsampling only the kept frames are computed;
//! * bias, ReLU, normalisation (gain, shift) and the dropout mask run in one pass per frame,
//!   in parallel over utterances. Batch normalisation first needs the mean and then the variance
//!   of every unit over the batch's valid frames: two more passes over `z`;
//! * the backward pass runs the same pass in reverse per frame (keeping what the forward pass
//!   computed: the post-ReLU values and per-frame statistics for layer normalisation, `z` and
//!   the per-unit statistics for batch normalisation, whose gradient needs one more pass for
//!   the batch-mean terms), then `2K` matrix products for the weight and input gradients. The
//!   input gradient is skipped when the input does not need one (the features).
//!
//! What `params` holds is set by the [`Transform`].
//!
//! The products run in f32 through the `gemm` crate, or, in a training pass with `[training]
//! matmul_precision = "bf16"` on a CPU with AVX-512 BF16, with bfloat16 operands through the
//! hand-written kernel of `bf16_matmul.rs`; inference passes are always f32.
//!
//! Reductions over frames (bias, gain and shift gradients, batch statistics) are summed per
//! utterance and then over utterances in order, so results do not depend on the thread count.
//!
//! In a data-parallel run ([`FusedLayer::with_collective`]) the operation sees one rank's part
//! of the batch: batch normalisation sums its unit sums and frame count, then its squared
//! deviations, over the ranks before normalising, and in the backward pass the batch terms
//! `Σ g` and `Σ g·x̂`; the gain and shift gradients it returns stay the rank's own (the trainer
//! sums every gradient over the ranks once).

use std::sync::{Arc, Mutex};

use crate::collective::Collective;
use crate::config::MatmulPrecision;

use candle_core::{CpuStorage, CustomOp3, Layout, Shape, Storage, Tensor};
use gemm::{gemm, Parallelism};
use rayon::prelude::*;

/// Added to the variance before the square root in layer and batch normalisation.
pub(crate) const NORM_EPSILON: f32 = 1e-5;

/// What follows the matrix products `z`, and what the `params` input holds.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Transform {
    /// `params` `[1, H]`: bias. `z + b`, then ReLU if the layer has one.
    Bias,
    /// `params` `[3, H]`: bias, gain, shift. `ReLU(z + b)`, then normalised per frame over the
    /// `H` units.
    LayerNorm,
    /// `params` `[2, H]`: gain γ, shift β. Every unit normalised with the mean and the biased
    /// variance of `z` over the batch's valid frames, then ReLU. Frames past an utterance's
    /// valid count are normalised with the same statistics but do not count in them.
    BatchNorm {
        /// Valid output frames of each utterance (its first frames).
        valid: Vec<usize>,
    },
    /// `params` `[4, H]`: mean μ, `1 / √(σ² + ε)`, gain γ, shift β of fixed (running) statistics:
    /// the same arithmetic as [`Transform::BatchNorm`] without a batch. Inference only; it has no
    /// backward pass.
    FixedNorm,
}

/// Per-unit statistics of one batch-normalised layer over one batch.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct UnitStatistics {
    /// Mean of every unit over the valid frames.
    pub mean: Vec<f32>,
    /// Biased variance (divided by the frame count) of every unit.
    pub variance: Vec<f32>,
    /// Valid frames the statistics are over.
    pub frames: usize,
}

/// What the forward pass keeps for the backward pass.
enum Saved {
    /// Bias and layer norm: `[batch · frames_out, H]` values after bias and ReLU, before
    /// normalisation (empty without ReLU and normalisation), and per output frame the mean and
    /// `1 / sqrt(variance + ε)` (layer norm only).
    Frames {
        activations: Vec<f32>,
        stats: Vec<(f32, f32)>,
    },
    /// Batch norm: the pre-activation buffer `z`, the batch statistics and per unit
    /// `1 / sqrt(variance + ε)`.
    Units {
        z: Vec<f32>,
        statistics: UnitStatistics,
        inverse: Vec<f32>,
    },
    /// Fixed statistics (no backward pass).
    Nothing,
}

/// The fused layer operation; see the module documentation.
pub(crate) struct FusedLayer {
    /// `o_k − o_1` for each offset.
    pub shifts: Vec<usize>,
    /// Subsampling factor `s` (≥ 1).
    pub subsample: usize,
    /// Output width `H`.
    pub output_dims: usize,
    /// ReLU (after the bias, or after batch normalisation).
    pub relu: bool,
    /// What follows the matrix products.
    pub transform: Transform,
    /// `[batch, frames_out, H]` dropout multipliers (0 or `1/(1−p)`), if any.
    pub mask: Option<Vec<f32>>,
    /// Whether to compute the input gradient.
    pub input_grad: bool,
    /// Number format of the matrix products.
    precision: MatmulPrecision,
    /// The weights of each offset already converted for the bf16 kernels (inference of a
    /// loaded model, whose weights do not change); used when `precision` is bf16.
    packed_weights: Option<Arc<PackedWeights>>,
    saved: Mutex<Option<Saved>>,
    /// Where the forward pass leaves the batch statistics (batch normalisation), for the caller:
    /// candle keeps the operation itself.
    statistics: Arc<Mutex<Option<UnitStatistics>>>,
    /// The ranks of a data-parallel run, when there are several: batch normalisation then
    /// sums its statistics and its gradient's batch terms over every rank's part of the batch.
    collective: Option<Arc<dyn Collective>>,
}

/// The batch statistics a [`FusedLayer`] leaves behind.
pub(crate) type StatisticsSlot = Arc<Mutex<Option<UnitStatistics>>>;

/// Where the rows of the `[rows, H]` pre-activation buffer come from.
#[derive(Debug, Clone, Copy)]
struct Geometry {
    batch: usize,
    frames: usize,
    dims: usize,
    frames_out: usize,
    /// Rows of the buffer per utterance (output frame `t` of utterance `b` is row `b·q + t`).
    q: usize,
    /// Row blocks for the matrix products: one block over the whole batch when the frames of
    /// every utterance line up with the subsampling period, else one per utterance.
    per_utterance: bool,
}

impl Geometry {
    fn rows(&self) -> usize {
        (self.batch - 1) * self.q + self.frames_out
    }

    /// `(first input row, first buffer row, rows)` of each block.
    fn blocks(&self, subsample: usize) -> Vec<(usize, usize, usize)> {
        if self.per_utterance {
            (0..self.batch)
                .map(|b| (b * self.frames, b * self.q, self.frames_out))
                .collect()
        } else {
            debug_assert_eq!(self.q * subsample, self.frames);
            vec![(0, 0, self.rows())]
        }
    }
}

fn parallelism() -> Parallelism {
    match rayon::current_num_threads() {
        0 | 1 => Parallelism::None,
        n => Parallelism::Rayon(n),
    }
}

/// A row-major matrix view: base offset into a slice, row stride and column stride.
#[derive(Debug, Clone, Copy)]
pub(crate) struct View {
    pub offset: usize,
    pub row_stride: usize,
    pub col_stride: usize,
}

/// Whether this CPU runs the bfloat16 products of [`MatmulPrecision::Bf16`].
pub(crate) fn bf16_available() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        crate::bf16_matmul::available()
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// `dst = (accumulate ? dst : 0) + lhs · rhs` for `[m, k] · [k, n]` views, in f32 or with the
/// operands rounded to bfloat16 (`precision`, where the CPU has the instructions).
///
/// Checks that every view stays inside its slice, so the unsafe call only reads and writes
/// inside the given slices.
#[allow(clippy::too_many_arguments)]
pub(crate) fn matmul(
    precision: MatmulPrecision,
    (m, n, k): (usize, usize, usize),
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    lhs: &[f32],
    lhs_view: View,
    rhs: &[f32],
    rhs_view: View,
) -> candle_core::Result<()> {
    if m == 0 || n == 0 {
        return Ok(());
    }
    let last = |v: View, rows: usize, cols: usize| {
        v.offset + (rows - 1) * v.row_stride + (cols.max(1) - 1) * v.col_stride
    };
    if last(dst_view, m, n) >= dst.len()
        || (k > 0 && (last(lhs_view, m, k) >= lhs.len() || last(rhs_view, k, n) >= rhs.len()))
    {
        candle_core::bail!("fused TDNN layer: a matrix view exceeds its buffer")
    }
    if k == 0 {
        if !accumulate {
            for i in 0..m {
                for j in 0..n {
                    dst[dst_view.offset + i * dst_view.row_stride + j * dst_view.col_stride] = 0.0;
                }
            }
        }
        return Ok(());
    }
    #[cfg(target_arch = "x86_64")]
    if precision == MatmulPrecision::Bf16 && bf16_available() {
        // SAFETY: the CPU has the instructions (checked); m, n, k ≥ 1 and the views lie inside
        // their slices (checked above); the destination rows are distinct (as below).
        unsafe {
            crate::bf16_matmul::matmul(
                (m, n, k),
                dst,
                dst_view,
                accumulate,
                lhs,
                lhs_view,
                rhs,
                rhs_view,
            )
        };
        return Ok(());
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = precision;
    // SAFETY: every element addressed by the three views lies inside its slice (checked above);
    // `dst` is borrowed mutably and does not alias `lhs` or `rhs`; the destination rows of one
    // call are distinct (row stride ≥ n · column stride for every caller).
    unsafe {
        gemm(
            m,
            n,
            k,
            dst.as_mut_ptr().add(dst_view.offset),
            dst_view.col_stride as isize,
            dst_view.row_stride as isize,
            accumulate,
            lhs.as_ptr().add(lhs_view.offset),
            lhs_view.col_stride as isize,
            lhs_view.row_stride as isize,
            rhs.as_ptr().add(rhs_view.offset),
            rhs_view.col_stride as isize,
            rhs_view.row_stride as isize,
            if accumulate { 1.0 } else { 0.0 },
            1.0,
            false,
            false,
            false,
            parallelism(),
        );
    }
    Ok(())
}

/// A layer's weights `[input_dims, K · H]` converted for the bf16 kernels, one operand per
/// offset (the `[input_dims, H]` block of each).
pub(crate) struct PackedWeights {
    #[cfg(target_arch = "x86_64")]
    offsets: Vec<crate::bf16_matmul::PackedRhs>,
}

impl PackedWeights {
    /// The `offsets` blocks of `weights` (`[dims, offsets · h]`, row-major), converted; `None`
    /// where the CPU has no bf16 kernel or a shape is empty.
    pub fn new(weights: &[f32], dims: usize, offsets: usize, h: usize) -> Option<PackedWeights> {
        if dims == 0 || h == 0 || offsets == 0 || weights.len() != dims * offsets * h {
            return None;
        }
        #[cfg(target_arch = "x86_64")]
        if bf16_available() {
            let offsets = (0..offsets)
                .map(|k| {
                    let view = View {
                        offset: k * h,
                        row_stride: offsets * h,
                        col_stride: 1,
                    };
                    // SAFETY: the CPU has the instructions (checked); dims, h ≥ 1 and the view
                    // lies inside `weights` (its length checked above).
                    unsafe { crate::bf16_matmul::PackedRhs::new(weights, view, (dims, h), 16) }
                })
                .collect();
            return Some(PackedWeights { offsets });
        }
        None
    }

    /// Whether these are the weights of a layer of `offsets` offsets from `dims` to `h`.
    fn fits(&self, offsets: usize, dims: usize, h: usize) -> bool {
        #[cfg(target_arch = "x86_64")]
        return self.offsets.len() == offsets
            && self.offsets.iter().all(|p| p.k == dims && p.n == h);
        #[cfg(not(target_arch = "x86_64"))]
        {
            let _ = (offsets, dims, h);
            false
        }
    }

    /// [`matmul`] in bf16 with offset `k`'s weights as the right operand: `dst = (accumulate ?
    /// dst : 0) + lhs · W_k` for an `[m, dims]` view of `lhs`. Checks the views as [`matmul`]
    /// does.
    #[allow(clippy::too_many_arguments)]
    fn product(
        &self,
        k: usize,
        m: usize,
        dst: &mut [f32],
        dst_view: View,
        accumulate: bool,
        lhs: &[f32],
        lhs_view: View,
    ) -> candle_core::Result<()> {
        #[cfg(target_arch = "x86_64")]
        {
            let packed = &self.offsets[k];
            if m == 0 {
                return Ok(());
            }
            let last = |v: View, rows: usize, cols: usize| {
                v.offset + (rows - 1) * v.row_stride + (cols.max(1) - 1) * v.col_stride
            };
            if last(dst_view, m, packed.n) >= dst.len() || last(lhs_view, m, packed.k) >= lhs.len()
            {
                candle_core::bail!("fused TDNN layer: a matrix view exceeds its buffer")
            }
            // SAFETY: the CPU has the instructions (converted weights exist only where it
            // does); m ≥ 1 and a converted operand is never empty; the views lie inside their
            // slices (checked above); the destination rows are distinct (row stride ≥ n for
            // every caller).
            unsafe {
                crate::bf16_matmul::matmul_packed(
                    m,
                    dst,
                    dst_view,
                    accumulate,
                    (lhs, lhs_view),
                    packed,
                )
            };
            Ok(())
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            let _ = (k, m, dst, dst_view, accumulate, lhs, lhs_view);
            candle_core::bail!("fused TDNN layer: no converted weights on this CPU")
        }
    }
}

impl std::fmt::Debug for PackedWeights {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("PackedWeights")
    }
}

fn contiguous_f32<'a>(
    storage: &'a CpuStorage,
    layout: &Layout,
    what: &str,
) -> candle_core::Result<&'a [f32]> {
    let CpuStorage::F32(values) = storage else {
        candle_core::bail!("fused TDNN layer: the {what} must be f32")
    };
    match layout.contiguous_offsets() {
        Some((start, end)) => Ok(&values[start..end]),
        None => candle_core::bail!("fused TDNN layer: the {what} must be contiguous"),
    }
}

/// Runs `f` on the contiguous f32 values of a CPU tensor.
fn with_values<T>(
    tensor: &Tensor,
    what: &str,
    f: impl FnOnce(&[f32]) -> candle_core::Result<T>,
) -> candle_core::Result<T> {
    let (storage, layout) = tensor.storage_and_layout();
    match &*storage {
        Storage::Cpu(cpu) => f(contiguous_f32(cpu, layout, what)?),
        _ => candle_core::bail!("fused TDNN layer: the {what} must be on the CPU"),
    }
}

impl FusedLayer {
    /// A layer operation; see the field documentation.
    pub fn new(
        shifts: Vec<usize>,
        subsample: usize,
        output_dims: usize,
        relu: bool,
        transform: Transform,
        mask: Option<Vec<f32>>,
        input_grad: bool,
    ) -> Self {
        FusedLayer {
            shifts,
            subsample,
            output_dims,
            relu,
            transform,
            mask,
            input_grad,
            precision: MatmulPrecision::F32,
            packed_weights: None,
            saved: Mutex::new(None),
            statistics: StatisticsSlot::default(),
            collective: None,
        }
    }

    /// Batch normalisation over the whole batch of a data-parallel run, of which this operation
    /// sees this rank's part (see the module documentation).
    pub fn with_collective(mut self, collective: Option<Arc<dyn Collective>>) -> Self {
        self.collective = collective;
        self
    }

    /// Matrix products in `precision` instead of f32.
    pub fn with_precision(mut self, precision: MatmulPrecision) -> Self {
        self.precision = precision;
        self
    }

    /// The weights of every offset converted beforehand ([`PackedWeights::new`]), for bf16
    /// products; they must be the converted weight tensor this operation is applied with.
    pub fn with_packed_weights(mut self, packed: Option<Arc<PackedWeights>>) -> Self {
        self.packed_weights = packed;
        self
    }

    fn param_rows(&self) -> usize {
        match self.transform {
            Transform::Bias => 1,
            Transform::BatchNorm { .. } => 2,
            Transform::LayerNorm => 3,
            Transform::FixedNorm => 4,
        }
    }

    /// Where the forward pass will leave the batch statistics (batch normalisation only).
    pub fn statistics_slot(&self) -> StatisticsSlot {
        Arc::clone(&self.statistics)
    }

    fn geometry(
        &self,
        input: &Shape,
        weight: &Shape,
        params: &Shape,
    ) -> candle_core::Result<Geometry> {
        let (batch, frames, dims) = input.dims3()?;
        let (weight_rows, weight_cols) = weight.dims2()?;
        let (param_rows, param_cols) = params.dims2()?;
        let k = self.shifts.len();
        let h = self.output_dims;
        let s = self.subsample;
        if k == 0 || s == 0 || batch == 0 {
            candle_core::bail!("fused TDNN layer: no offsets, no subsampling or an empty batch")
        }
        if weight_rows != dims
            || weight_cols != k * h
            || param_rows != self.param_rows()
            || param_cols != h
        {
            candle_core::bail!(
                "fused TDNN layer: input {batch}×{frames}×{dims}, weight {weight_rows}×{weight_cols}, params {param_rows}×{param_cols} do not fit {k} offsets × {h} outputs"
            )
        }
        let span = self.shifts.iter().copied().max().unwrap_or(0);
        if frames <= span {
            candle_core::bail!(
                "fused TDNN layer: a layer spanning {} frames got only {frames}",
                span + 1
            )
        }
        let frames_out = (frames - 1 - span) / s + 1;
        let per_utterance = frames % s != 0;
        let q = if per_utterance {
            frames_out
        } else {
            frames / s
        };
        Ok(Geometry {
            batch,
            frames,
            dims,
            frames_out,
            q,
            per_utterance,
        })
    }

    /// `z = Σ_k X_k · W_k` into a `[rows, H]` buffer.
    fn pre_activation(&self, g: &Geometry, x: &[f32], w: &[f32]) -> candle_core::Result<Vec<f32>> {
        let h = self.output_dims;
        let kh = self.shifts.len() * h;
        let s = self.subsample;
        let mut z = vec![0f32; g.rows() * h];
        // With bf16 products and the weights converted beforehand, the converted ones.
        let packed = match (self.precision, &self.packed_weights) {
            (MatmulPrecision::Bf16, Some(packed))
                if bf16_available() && packed.fits(self.shifts.len(), g.dims, h) =>
            {
                Some(packed)
            }
            _ => None,
        };
        for (x0, z0, m) in g.blocks(s) {
            for (k, &shift) in self.shifts.iter().enumerate() {
                let z_view = View {
                    offset: z0 * h,
                    row_stride: h,
                    col_stride: 1,
                };
                let x_view = View {
                    offset: (x0 + shift) * g.dims,
                    row_stride: s * g.dims,
                    col_stride: 1,
                };
                match packed {
                    Some(packed) => packed.product(k, m, &mut z, z_view, k > 0, x, x_view)?,
                    None => matmul(
                        self.precision,
                        (m, h, g.dims),
                        &mut z,
                        z_view,
                        k > 0,
                        x,
                        x_view,
                        w,
                        View {
                            offset: k * h,
                            row_stride: kh,
                            col_stride: 1,
                        },
                    )?,
                }
            }
        }
        Ok(z)
    }
}

impl FusedLayer {
    /// Bias, ReLU, layer normalisation and mask, one frame at a time.
    fn frame_forward(&self, g: &Geometry, z: &[f32], params: &[f32]) -> (Vec<f32>, Saved) {
        let h = self.output_dims;
        let out_len = g.batch * g.frames_out * h;
        let norm = self.transform == Transform::LayerNorm;
        let (bias, gain, shift) = (&params[..h], params.get(h..2 * h), params.get(2 * h..3 * h));
        let keep = self.relu || norm;
        let mut out = vec![0f32; out_len];
        let mut activations = if keep {
            vec![0f32; out_len]
        } else {
            Vec::new()
        };
        let mut stats = if norm {
            vec![(0f32, 0f32); g.batch * g.frames_out]
        } else {
            Vec::new()
        };
        let per_utt = g.frames_out * h;
        let frame = |b: usize, t: usize, orow: &mut [f32], act: Option<&mut [f32]>| -> (f32, f32) {
            let zrow = &z[(b * g.q + t) * h..][..h];
            for ((o, &zv), &bv) in orow.iter_mut().zip(zrow).zip(bias) {
                let v = zv + bv;
                *o = if self.relu { v.max(0.0) } else { v };
            }
            if let Some(act) = act {
                act.copy_from_slice(orow);
            }
            let mut stat = (0.0, 0.0);
            if let (Some(gain), Some(shift)) = (gain, shift) {
                let mean = orow.iter().sum::<f32>() / h as f32;
                let variance = orow.iter().map(|v| (v - mean) * (v - mean)).sum::<f32>() / h as f32;
                let inv = 1.0 / (variance + NORM_EPSILON).sqrt();
                for ((o, &gn), &sh) in orow.iter_mut().zip(gain).zip(shift) {
                    *o = (*o - mean) * inv * gn + sh;
                }
                stat = (mean, inv);
            }
            if let Some(mask) = &self.mask {
                let base = (b * g.frames_out + t) * h;
                for (o, &m) in orow.iter_mut().zip(&mask[base..base + h]) {
                    *o *= m;
                }
            }
            stat
        };
        if norm {
            out.par_chunks_mut(per_utt)
                .zip(activations.par_chunks_mut(per_utt))
                .zip(stats.par_chunks_mut(g.frames_out))
                .enumerate()
                .for_each(|(b, ((out_u, act_u), stats_u))| {
                    for t in 0..g.frames_out {
                        stats_u[t] = frame(
                            b,
                            t,
                            &mut out_u[t * h..(t + 1) * h],
                            Some(&mut act_u[t * h..(t + 1) * h]),
                        );
                    }
                });
        } else if keep {
            out.par_chunks_mut(per_utt)
                .zip(activations.par_chunks_mut(per_utt))
                .enumerate()
                .for_each(|(b, (out_u, act_u))| {
                    for t in 0..g.frames_out {
                        frame(
                            b,
                            t,
                            &mut out_u[t * h..(t + 1) * h],
                            Some(&mut act_u[t * h..(t + 1) * h]),
                        );
                    }
                });
        } else {
            out.par_chunks_mut(per_utt)
                .enumerate()
                .for_each(|(b, out_u)| {
                    for t in 0..g.frames_out {
                        frame(b, t, &mut out_u[t * h..(t + 1) * h], None);
                    }
                });
        }
        (out, Saved::Frames { activations, stats })
    }

    /// `((z − mean)·inverse)·gain + shift`, ReLU and mask, one frame at a time.
    fn unit_forward(
        &self,
        g: &Geometry,
        z: &[f32],
        [mean, inverse, gain, shift]: [&[f32]; 4],
    ) -> Vec<f32> {
        let h = self.output_dims;
        let per_utt = g.frames_out * h;
        let mut out = vec![0f32; g.batch * per_utt];
        out.par_chunks_mut(per_utt)
            .enumerate()
            .for_each(|(b, out_u)| {
                for t in 0..g.frames_out {
                    let zrow = &z[(b * g.q + t) * h..][..h];
                    let orow = &mut out_u[t * h..(t + 1) * h];
                    let (mean, inverse) = (&mean[..h], &inverse[..h]);
                    let (gain, shift) = (&gain[..h], &shift[..h]);
                    if self.relu {
                        for j in 0..h {
                            let u = normalised(zrow[j], mean[j], inverse[j]) * gain[j] + shift[j];
                            orow[j] = u.max(0.0);
                        }
                    } else {
                        for j in 0..h {
                            orow[j] = normalised(zrow[j], mean[j], inverse[j]) * gain[j] + shift[j];
                        }
                    }
                    if let Some(mask) = &self.mask {
                        let base = (b * g.frames_out + t) * h;
                        for (o, &m) in orow.iter_mut().zip(&mask[base..base + h]) {
                            *o *= m;
                        }
                    }
                }
            });
        out
    }

    /// Backward of mask, layer norm, ReLU and bias into `gz`; returns the parameter gradient.
    fn frame_backward(
        &self,
        g: &Geometry,
        gout: &[f32],
        params: &[f32],
        activations: &[f32],
        stats: &[(f32, f32)],
        gz: &mut [f32],
    ) -> Vec<f32> {
        let h = self.output_dims;
        let p_rows = self.param_rows();
        let gain = params.get(h..2 * h);
        let chunk = g.q * h;
        let partials: Vec<Vec<f32>> = gz
            .par_chunks_mut(chunk)
            .enumerate()
            .map(|(b, gz_u)| {
                let mut sums = vec![0f32; p_rows * h];
                let mut grow = vec![0f32; h];
                for t in 0..g.frames_out {
                    let o = b * g.frames_out + t;
                    grow.copy_from_slice(&gout[o * h..(o + 1) * h]);
                    if let Some(mask) = &self.mask {
                        for (gv, &m) in grow.iter_mut().zip(&mask[o * h..(o + 1) * h]) {
                            *gv *= m;
                        }
                    }
                    let act = if activations.is_empty() {
                        None
                    } else {
                        Some(&activations[o * h..(o + 1) * h])
                    };
                    if let (Some(gain), Some(act)) = (gain, act) {
                        let (mean, inv) = stats[o];
                        let (gain_sum, rest) = sums[h..].split_at_mut(h);
                        let shift_sum = &mut rest[..h];
                        let (mut a, mut c) = (0f32, 0f32);
                        for i in 0..h {
                            let xhat = (act[i] - mean) * inv;
                            gain_sum[i] += grow[i] * xhat;
                            shift_sum[i] += grow[i];
                            let gx = grow[i] * gain[i];
                            a += gx;
                            c += gx * xhat;
                            grow[i] = gx;
                        }
                        let (a, c) = (a / h as f32, c / h as f32);
                        for i in 0..h {
                            let xhat = (act[i] - mean) * inv;
                            grow[i] = inv * (grow[i] - a - xhat * c);
                        }
                    }
                    if let (true, Some(act)) = (self.relu, act) {
                        for (gv, &av) in grow.iter_mut().zip(act) {
                            if av <= 0.0 {
                                *gv = 0.0;
                            }
                        }
                    }
                    for (bs, &gv) in sums[..h].iter_mut().zip(&grow) {
                        *bs += gv;
                    }
                    gz_u[t * h..(t + 1) * h].copy_from_slice(&grow);
                }
                sums
            })
            .collect();
        let mut param_grad = vec![0f32; p_rows * h];
        for part in &partials {
            for (p, v) in param_grad.iter_mut().zip(part) {
                *p += v;
            }
        }
        param_grad
    }

    /// Backward of mask, ReLU and batch normalisation into `gz`; returns the gain and shift
    /// gradients. With `g_f` the gradient reaching `γ·x̂_f + β` at output frame `f` (after mask
    /// and ReLU), `x̂ = (z − μ)/σ`, sums over all output frames and `N` valid frames — the usual
    /// batch-norm gradient, in which frames that do not count in μ and σ keep their direct term
    /// only: `∂L/∂z_f = γ/σ · (g_f − [f valid] · (Σ g + x̂_f · Σ g·x̂) / N)`,
    /// `∂L/∂γ = Σ g·x̂`, `∂L/∂β = Σ g`.
    #[allow(clippy::too_many_arguments)]
    fn unit_backward(
        &self,
        g: &Geometry,
        gout: &[f32],
        params: &[f32],
        z: &[f32],
        statistics: &UnitStatistics,
        inverse: &[f32],
        valid: &[usize],
        gz: &mut [f32],
    ) -> candle_core::Result<Vec<f32>> {
        let h = self.output_dims;
        let (gain, shift) = (&params[..h], &params[h..2 * h]);
        let mean = &statistics.mean;
        let chunk = g.q * h;
        // Through the mask and the ReLU into `gz`, with per-utterance sums of g and g·x̂ (in f32
        // per utterance, so that the loops vectorise; over utterances in f64).
        let partials: Vec<(Vec<f32>, Vec<f32>)> = gz
            .par_chunks_mut(chunk)
            .enumerate()
            .map(|(b, gz_u)| {
                let (mut sum, mut dot) = (vec![0f32; h], vec![0f32; h]);
                for t in 0..g.frames_out {
                    let o = (b * g.frames_out + t) * h;
                    let zrow = &z[(b * g.q + t) * h..][..h];
                    let grow = &mut gz_u[t * h..(t + 1) * h];
                    grow.copy_from_slice(&gout[o..o + h]);
                    if let Some(mask) = &self.mask {
                        for (gv, &m) in grow.iter_mut().zip(&mask[o..o + h]) {
                            *gv *= m;
                        }
                    }
                    mask_backward_row(
                        self.relu,
                        grow,
                        [zrow, mean.as_slice(), inverse, gain, shift],
                        &mut sum,
                        &mut dot,
                    );
                }
                (sum, dot)
            })
            .collect();
        let (mut sum, mut dot) = (vec![0f64; h], vec![0f64; h]);
        for (part_sum, part_dot) in &partials {
            for j in 0..h {
                sum[j] += f64::from(part_sum[j]);
                dot[j] += f64::from(part_dot[j]);
            }
        }
        // The parameter gradients stay this rank's (the trainer sums them over the ranks with
        // every other gradient); the batch terms need the sums over the whole batch.
        let mut batch_sums: Vec<f64> = sum.iter().chain(&dot).copied().collect();
        if let Some(collective) = &self.collective {
            collective
                .sum_f64("the batch-norm gradient sums", &mut batch_sums)
                .map_err(|e| candle_core::Error::Msg(e.to_string()))?;
        }
        let n = statistics.frames as f64;
        let mean_g: Vec<f32> = batch_sums[..h].iter().map(|v| (v / n) as f32).collect();
        let mean_gx: Vec<f32> = batch_sums[h..].iter().map(|v| (v / n) as f32).collect();
        // The batch-mean terms, on valid frames only.
        gz.par_chunks_mut(chunk).enumerate().for_each(|(b, gz_u)| {
            for t in 0..g.frames_out {
                let zrow = &z[(b * g.q + t) * h..][..h];
                let grow = &mut gz_u[t * h..(t + 1) * h];
                let scales = gain.iter().zip(inverse);
                if t < valid[b] {
                    let units = zrow.iter().zip(mean).zip(mean_g.iter().zip(&mean_gx));
                    for ((gv, (&gn, &inv)), ((&zv, &m), (&mg, &mgx))) in
                        grow.iter_mut().zip(scales).zip(units)
                    {
                        let xhat = normalised(zv, m, inv);
                        *gv = gn * inv * (*gv - mg - xhat * mgx);
                    }
                } else {
                    for (gv, (&gn, &inv)) in grow.iter_mut().zip(scales) {
                        *gv *= gn * inv;
                    }
                }
            }
        });
        Ok(dot.iter().chain(&sum).map(|&v| v as f32).collect())
    }
}

/// One output frame of the first batch-norm backward pass: zeroes the gradient `g` where the
/// forward ReLU was off (`x̂·γ + β ≤ 0`, with `x̂ = (z − μ)·inverse`) and accumulates `Σ g` and
/// `Σ g·x̂` per unit. A function of its own over equal-length slices, with the ReLU test as a
/// select on a value loaded unconditionally, so that the loop vectorises: inside the closure,
/// with the test as a conditional store, it ran scalar (11 % of a training run in a profile).
fn mask_backward_row(
    relu: bool,
    g: &mut [f32],
    [z, mean, inverse, gain, shift]: [&[f32]; 5],
    sum: &mut [f32],
    dot: &mut [f32],
) {
    let n = g.len();
    let (z, mean, inverse) = (&z[..n], &mean[..n], &inverse[..n]);
    let (gain, shift, sum, dot) = (&gain[..n], &shift[..n], &mut sum[..n], &mut dot[..n]);
    if relu {
        for j in 0..n {
            let xhat = normalised(z[j], mean[j], inverse[j]);
            let value = g[j];
            let gv = if xhat * gain[j] + shift[j] <= 0.0 {
                0.0
            } else {
                value
            };
            g[j] = gv;
            sum[j] += gv;
            dot[j] += gv * xhat;
        }
    } else {
        for j in 0..n {
            let xhat = normalised(z[j], mean[j], inverse[j]);
            sum[j] += g[j];
            dot[j] += g[j] * xhat;
        }
    }
}

/// `(z − mean)·inverse`, written once so that the forward and backward passes round alike (the
/// ReLU's mask must be the one the forward pass applied).
fn normalised(z: f32, mean: f32, inverse: f32) -> f32 {
    (z - mean) * inverse
}

/// Mean and biased variance (two passes) of every unit of `z` over the valid frames (the first
/// `valid[b]` output frames of utterance `b`): sums per utterance, then over utterances in order.
fn unit_statistics(
    g: &Geometry,
    z: &[f32],
    valid: &[usize],
    h: usize,
    collective: Option<&dyn Collective>,
) -> candle_core::Result<UnitStatistics> {
    if valid.len() != g.batch || valid.iter().any(|&v| v > g.frames_out) {
        candle_core::bail!(
            "fused TDNN layer: valid frame counts {valid:?} for {} utterances of {} output frames",
            g.batch,
            g.frames_out
        )
    }
    let local_frames: usize = valid.iter().sum();
    // Sums per utterance in f32 (the loops vectorise), over utterances in f64.
    let total = |centre: Option<&[f32]>| -> Vec<f64> {
        let parts: Vec<Vec<f32>> = (0..g.batch)
            .into_par_iter()
            .map(|b| {
                let mut sums = vec![0f32; h];
                for t in 0..valid[b] {
                    let row = &z[(b * g.q + t) * h..][..h];
                    match centre {
                        None => {
                            for (s, &v) in sums.iter_mut().zip(row) {
                                *s += v;
                            }
                        }
                        Some(mean) => {
                            for ((s, &v), &m) in sums.iter_mut().zip(row).zip(mean) {
                                *s += (v - m) * (v - m);
                            }
                        }
                    }
                }
                sums
            })
            .collect();
        let mut sums = vec![0f64; h];
        for part in parts {
            for (s, p) in sums.iter_mut().zip(part) {
                *s += f64::from(p);
            }
        }
        sums
    };
    let mut sums = total(None);
    sums.push(local_frames as f64);
    global_statistics(collective, sums, |mean| total(Some(mean)))
}

/// Mean and variance from this rank's unit sums (with its valid frame count appended), summed
/// over the ranks when there are several; `centred(mean)` gives this rank's sums of squared
/// deviations from the (global) mean. A rank with no part in the batch passes zeros.
pub(crate) fn global_statistics(
    collective: Option<&dyn Collective>,
    mut sums: Vec<f64>,
    centred: impl FnOnce(&[f32]) -> Vec<f64>,
) -> candle_core::Result<UnitStatistics> {
    let to_candle = |e: crate::AcousticError| candle_core::Error::Msg(e.to_string());
    if let Some(collective) = collective {
        collective
            .sum_f64("the batch-norm means", &mut sums)
            .map_err(to_candle)?;
    }
    let frames_sum = sums.pop().unwrap_or(0.0);
    if frames_sum < 1.0 {
        candle_core::bail!(
            "fused TDNN layer: batch normalisation over a batch without valid frames"
        )
    }
    let frames = frames_sum as usize;
    let n = frames as f64;
    let mean: Vec<f32> = sums.iter().map(|&s| (s / n) as f32).collect();
    let mut squares = centred(&mean);
    if let Some(collective) = collective {
        collective
            .sum_f64("the batch-norm variances", &mut squares)
            .map_err(to_candle)?;
    }
    let variance: Vec<f32> = squares.iter().map(|&s| (s / n) as f32).collect();
    Ok(UnitStatistics {
        mean,
        variance,
        frames,
    })
}

/// `1 / √(variance + ε)` of every unit.
pub(crate) fn inverse_deviations(variance: &[f32]) -> Vec<f32> {
    variance
        .iter()
        .map(|&v| (1.0 / (f64::from(v) + f64::from(NORM_EPSILON)).sqrt()) as f32)
        .collect()
}

impl CustomOp3 for FusedLayer {
    fn name(&self) -> &'static str {
        "fused-tdnn-layer"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
        s3: &CpuStorage,
        l3: &Layout,
    ) -> candle_core::Result<(CpuStorage, Shape)> {
        let g = self.geometry(l1.shape(), l2.shape(), l3.shape())?;
        let x = contiguous_f32(s1, l1, "input")?;
        let w = contiguous_f32(s2, l2, "weight")?;
        let params = contiguous_f32(s3, l3, "layer parameters")?;
        let h = self.output_dims;
        let out_len = g.batch * g.frames_out * h;
        if let Some(mask) = &self.mask {
            if mask.len() != out_len {
                candle_core::bail!(
                    "fused TDNN layer: dropout mask of {} values for {out_len} outputs",
                    mask.len()
                )
            }
        }
        let z = self.pre_activation(&g, x, w)?;
        let rows = |r: usize| &params[r * h..(r + 1) * h];
        let (out, saved) = match &self.transform {
            Transform::Bias | Transform::LayerNorm => self.frame_forward(&g, &z, params),
            Transform::BatchNorm { valid } => {
                let statistics = unit_statistics(&g, &z, valid, h, self.collective.as_deref())?;
                let inverse = inverse_deviations(&statistics.variance);
                let out = self.unit_forward(&g, &z, [&statistics.mean, &inverse, rows(0), rows(1)]);
                *self.statistics.lock().map_err(|_| {
                    candle_core::Error::Msg("fused TDNN layer statistics poisoned".into())
                })? = Some(statistics.clone());
                (
                    out,
                    Saved::Units {
                        z,
                        statistics,
                        inverse,
                    },
                )
            }
            Transform::FixedNorm => {
                let out = self.unit_forward(&g, &z, [rows(0), rows(1), rows(2), rows(3)]);
                (out, Saved::Nothing)
            }
        };
        let mut slot = self
            .saved
            .lock()
            .map_err(|_| candle_core::Error::Msg("fused TDNN layer state poisoned".into()))?;
        *slot = Some(saved);
        Ok((
            CpuStorage::F32(out),
            Shape::from((g.batch, g.frames_out, h)),
        ))
    }

    fn bwd(
        &self,
        input: &Tensor,
        weight: &Tensor,
        params: &Tensor,
        _res: &Tensor,
        grad_res: &Tensor,
    ) -> candle_core::Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        let g = self.geometry(input.shape(), weight.shape(), params.shape())?;
        let h = self.output_dims;
        let kh = self.shifts.len() * h;
        let s = self.subsample;
        let p_rows = self.param_rows();
        let guard = self
            .saved
            .lock()
            .map_err(|_| candle_core::Error::Msg("fused TDNN layer state poisoned".into()))?;
        let Some(saved) = guard.as_ref() else {
            candle_core::bail!("fused TDNN layer: backward pass before the forward pass")
        };
        let grad_res = grad_res.contiguous()?;
        // Backward of everything after the matrix products into `gz` (buffer layout), with the
        // parameter gradients.
        let mut gz = vec![0f32; g.rows() * h];
        let param_grad = with_values(&grad_res, "output gradient", |gout| {
            with_values(params, "layer parameters", |params| {
                match (&self.transform, saved) {
                    (Transform::Bias | Transform::LayerNorm, Saved::Frames { activations, stats }) => {
                        Ok(self.frame_backward(&g, gout, params, activations, stats, &mut gz))
                    }
                    (
                        Transform::BatchNorm { valid },
                        Saved::Units {
                            z,
                            statistics,
                            inverse,
                        },
                    ) => self.unit_backward(
                        &g, gout, params, z, statistics, inverse, valid, &mut gz,
                    ),
                    (Transform::FixedNorm, _) => candle_core::bail!(
                        "fused TDNN layer: batch normalisation with running statistics is for inference; it has no backward pass"
                    ),
                    _ => candle_core::bail!(
                        "fused TDNN layer: the forward pass kept the wrong state"
                    ),
                }
            })
        })?;
        drop(guard);
        let (weight_grad, input_grad) = with_values(input, "input", |x| {
            with_values(weight, "weight", |w| {
                let mut gw = vec![0f32; g.dims * kh];
                let mut gx = if self.input_grad {
                    vec![0f32; g.batch * g.frames * g.dims]
                } else {
                    Vec::new()
                };
                for (block, (x0, z0, m)) in g.blocks(s).into_iter().enumerate() {
                    for (k, &shift) in self.shifts.iter().enumerate() {
                        let x_view = View {
                            offset: (x0 + shift) * g.dims,
                            row_stride: s * g.dims,
                            col_stride: 1,
                        };
                        // gW_k += X_kᵀ · gz
                        matmul(
                            self.precision,
                            (g.dims, h, m),
                            &mut gw,
                            View {
                                offset: k * h,
                                row_stride: kh,
                                col_stride: 1,
                            },
                            block > 0,
                            x,
                            View {
                                offset: x_view.offset,
                                row_stride: 1,
                                col_stride: x_view.row_stride,
                            },
                            &gz,
                            View {
                                offset: z0 * h,
                                row_stride: h,
                                col_stride: 1,
                            },
                        )?;
                        if self.input_grad {
                            // gX_k += gz · W_kᵀ
                            matmul(
                                self.precision,
                                (m, g.dims, h),
                                &mut gx,
                                x_view,
                                true,
                                &gz,
                                View {
                                    offset: z0 * h,
                                    row_stride: h,
                                    col_stride: 1,
                                },
                                w,
                                View {
                                    offset: k * h,
                                    row_stride: 1,
                                    col_stride: kh,
                                },
                            )?;
                        }
                    }
                }
                Ok((gw, gx))
            })
        })?;
        let device = input.device();
        let input_grad = if self.input_grad {
            Some(Tensor::from_vec(
                input_grad,
                (g.batch, g.frames, g.dims),
                device,
            )?)
        } else {
            None
        };
        Ok((
            input_grad,
            Some(Tensor::from_vec(weight_grad, (g.dims, kh), device)?),
            Some(Tensor::from_vec(param_grad, (p_rows, h), device)?),
        ))
    }
}

/// Median wall time in seconds of `runs` products `[m, k] · [k, n]` of random values in
/// `precision`, through the function the fused layers use: with `lhs_transposed` the left
/// operand is read down its columns (as in the weight gradient), with `rhs_transposed` the right
/// one (as in the input gradient). For the `train_step` benchmark.
pub fn time_matmul(
    precision: MatmulPrecision,
    (m, n, k): (usize, usize, usize),
    (lhs_transposed, rhs_transposed): (bool, bool),
    runs: usize,
) -> candle_core::Result<f64> {
    let view = |rows: usize, cols: usize, transposed: bool| {
        if transposed {
            View {
                offset: 0,
                row_stride: 1,
                col_stride: rows,
            }
        } else {
            View {
                offset: 0,
                row_stride: cols,
                col_stride: 1,
            }
        }
    };
    // A fixed pseudo-random fill: the values do not change the time.
    let fill = |len: usize| -> Vec<f32> {
        (0..len)
            .map(|i| ((i.wrapping_mul(2_654_435_761) % 2001) as f32 - 1000.0) / 1000.0)
            .collect()
    };
    let (lhs, rhs, mut dst) = (fill(m * k), fill(k * n), vec![0f32; m * n]);
    let mut times = Vec::with_capacity(runs);
    for _ in 0..runs.max(1) {
        let start = std::time::Instant::now();
        matmul(
            precision,
            (m, n, k),
            &mut dst,
            view(m, n, false),
            false,
            &lhs,
            view(m, k, lhs_transposed),
            &rhs,
            view(k, n, rhs_transposed),
        )?;
        times.push(start.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    Ok(times[times.len() / 2])
}

//! Matrix products of the training pass with operands rounded to bfloat16 and f32 accumulation.
//!
//! The training step is bound by its matrix products (about two thirds of a one-thread run in
//! the f32 micro-kernel of the `gemm` crate). CPUs with the AVX-512 BF16 extension multiply
//! pairs of bfloat16 values into f32 sums (`VDPBF16PS`: lane `i` of the accumulator gains
//! `a[2i]·b[2i] + a[2i+1]·b[2i+1]`) at twice the rate of f32 fused multiply-adds, so the
//! products of the fused TDNN layers can run on it when the configuration asks for it
//! (`[training] matmul_precision = "bf16"`). The master weights, the optimizer, the
//! normalisation and CTC stay f32; inference never comes here.
//!
//! The product `dst = (accumulate ? dst : 0) + lhs · rhs` over strided views is blocked in the
//! usual way for a register-blocked kernel:
//!
//! * `rhs` is converted once per call into panels of [`NR`] columns, with the `k` index taken
//!   in pairs and the two values of a pair side by side (one 32-bit lane per column and pair);
//! * the rows are split into blocks of at most [`MC`] rows, the unit of work of a thread; each
//!   block converts its rows of `lhs`, [`KC`] pairs of `k` at a time, into panels of [`MR`]
//!   rows (one 32-bit pair per row and pair);
//! * the micro-kernel keeps an `MR × NR` tile of f32 sums in 28 registers, broadcasts each
//!   row's pair and multiplies it with the two registers of the column panel, then adds the
//!   tile to the destination once per `KC` block. An odd `k` is padded with a zero pair
//!   member, the ragged row and column edges with zero rows and columns that are not stored.
//!
//! Every destination element is summed by one thread in one order (pairs in `k` order within
//! a block, blocks in `k` order), whatever the thread count: only rows are split between
//! threads, never `k`.
//!
//! f32 → bfloat16 rounds to nearest, ties to even, on the bit pattern (bfloat16 is the upper
//! 16 bits of binary32; IEEE 754 round-to-nearest-even, the common practice), NaN to the quiet
//! NaN `0x7FC0`. The instruction that converts in hardware (`VCVTNE2PS2BF16`) treats subnormal
//! inputs as zero; the integer rounding here keeps them, and gives the same bits in the scalar
//! and the vector path.

use std::arch::x86_64::*;

use rayon::prelude::*;

use crate::fused::View;

/// Rows of the register tile.
const MR: usize = 14;
/// Columns of the register tile: two registers of 16 f32 lanes.
pub(crate) const NR: usize = 32;
/// Pairs of `k` per block: a column panel of `KC` pairs (`KC · NR · 4` bytes = 16 KiB) and a row
/// panel (7 KiB) stay in a 32 KiB L1 cache while the micro-kernel runs.
const KC: usize = 128;
/// Rows per block at most: `MC · KC · 4` bytes = 168 KiB of converted rows, in L2.
const MC: usize = MR * 24;

/// Whether this CPU runs the bfloat16 products (checked once per call; the standard library
/// caches the detection).
pub(crate) fn available() -> bool {
    is_x86_feature_detected!("avx512f")
        && is_x86_feature_detected!("avx512bw")
        && is_x86_feature_detected!("avx512bf16")
}

/// `x` rounded to bfloat16 (to nearest, ties to even), as its bit pattern.
pub(crate) fn to_bf16(x: f32) -> u16 {
    if x.is_nan() {
        return 0x7FC0;
    }
    let bits = x.to_bits();
    let rounding = 0x7FFF + ((bits >> 16) & 1);
    (bits.wrapping_add(rounding) >> 16) as u16
}

/// The value of a bfloat16 bit pattern.
#[cfg(test)]
pub(crate) fn from_bf16(bits: u16) -> f32 {
    f32::from_bits(u32::from(bits) << 16)
}

/// The bfloat16 pair `(a, b)` as one 32-bit lane: `a` in the low half, as the instruction reads
/// `a[2i]` before `a[2i+1]`.
pub(crate) fn pair(a: f32, b: f32) -> u32 {
    u32::from(to_bf16(a)) | (u32::from(to_bf16(b)) << 16)
}

/// Sixteen f32 lanes rounded to bfloat16 as [`to_bf16`] does, in the low halves of 32-bit lanes.
#[inline]
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
pub(crate) fn round16(v: __m512) -> __m512i {
    let bits = _mm512_castps_si512(v);
    let odd = _mm512_and_si512(_mm512_srli_epi32::<16>(bits), _mm512_set1_epi32(1));
    let rounding = _mm512_add_epi32(odd, _mm512_set1_epi32(0x7FFF));
    let rounded = _mm512_srli_epi32::<16>(_mm512_add_epi32(bits, rounding));
    let nan = _mm512_cmp_ps_mask::<_CMP_UNORD_Q>(v, v);
    _mm512_mask_mov_epi32(rounded, nan, _mm512_set1_epi32(0x7FC0))
}

/// Lane mask of the first `count` (≤ 16) lanes.
pub(crate) fn lanes(count: usize) -> __mmask16 {
    if count >= 16 {
        0xFFFF
    } else {
        ((1u32 << count) - 1) as __mmask16
    }
}

/// `dst = (accumulate ? dst : 0) + lhs · rhs` for `[m, k] · [k, n]` views, operands rounded to
/// bfloat16, sums in f32.
///
/// # Safety
///
/// The CPU has AVX-512 F, BW and BF16 ([`available`]); `m`, `n`, `k` ≥ 1; every element the
/// three views address lies inside its slice; the destination elements are distinct (row
/// stride ≥ `n` × column stride).
#[allow(clippy::too_many_arguments)]
pub(crate) unsafe fn matmul(
    shape: (usize, usize, usize),
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    lhs: &[f32],
    lhs_view: View,
    rhs: &[f32],
    rhs_view: View,
) {
    let kernel = if crate::bf16_amx::usable() {
        Kernel::Tiles
    } else {
        Kernel::Registers
    };
    // SAFETY: the caller's guarantees; the tile kernel only where usable.
    unsafe {
        matmul_with(
            kernel, shape, dst, dst_view, accumulate, lhs, lhs_view, rhs, rhs_view,
        )
    }
}

/// Which kernel runs the bfloat16 products.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Kernel {
    /// The AVX-512 BF16 register kernel of this module.
    Registers,
    /// The AMX tile kernel ([`crate::bf16_amx`]).
    Tiles,
}

/// [`matmul`] with the kernel named.
///
/// # Safety
///
/// As [`matmul`]; [`Kernel::Tiles`] only where [`crate::bf16_amx::usable`].
#[allow(clippy::too_many_arguments)]
pub(crate) unsafe fn matmul_with(
    kernel: Kernel,
    (m, n, k): (usize, usize, usize),
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    lhs: &[f32],
    lhs_view: View,
    rhs: &[f32],
    rhs_view: View,
) {
    if kernel == Kernel::Tiles {
        // SAFETY: the caller's guarantees.
        unsafe {
            crate::bf16_amx::matmul(
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
        return;
    }
    // SAFETY: the caller's guarantees.
    let packed = unsafe { PackedRhs::new(rhs, rhs_view, (k, n), 1) };
    // SAFETY: the caller's guarantees; `packed` is `rhs` converted.
    unsafe { register_product((m, n, k), dst, dst_view, accumulate, lhs, lhs_view, &packed) }
}

/// The right operand `[k, n]` of a product converted once for either kernel: panels of [`NR`]
/// columns, one 32-bit lane per column and pair of `k` (pair `q`, column `j` of panel `p` at
/// `(p · panel_pairs + q) · NR + j`), each panel `panel_pairs` pairs long (a multiple of the
/// kernel's unit; the pairs past `k` and the columns past `n` are zero). A network's weights
/// are converted this way once for all the segments it reads ([`crate::tdnn::Tdnn::
/// set_inference_precision`]).
pub(crate) struct PackedRhs {
    pub(crate) data: Vec<u32>,
    pub(crate) k: usize,
    pub(crate) n: usize,
    pub(crate) panel_pairs: usize,
}

impl PackedRhs {
    /// `rhs` through `view` (`k` × `n`), panels padded to a multiple of `unit` pairs.
    ///
    /// # Safety
    ///
    /// The CPU has AVX-512 F, BW and BF16; `k`, `n` ≥ 1; every element the view addresses lies
    /// inside `rhs`.
    pub(crate) unsafe fn new(
        rhs: &[f32],
        view: View,
        (k, n): (usize, usize),
        unit: usize,
    ) -> PackedRhs {
        let panel_pairs = k.div_ceil(2).div_ceil(unit) * unit;
        let mut data = vec![0u32; n.div_ceil(NR) * panel_pairs * NR];
        // SAFETY: the caller's guarantees; `data` holds every panel.
        unsafe { pack_panels(&mut data, rhs, view, (k, n), panel_pairs) };
        PackedRhs {
            data,
            k,
            n,
            panel_pairs,
        }
    }
}

/// `rhs` through `view` (`k` × `n`) into `data` as [`PackedRhs`] lays it out, panels of
/// `panel_pairs` pairs (≥ the pairs of `k`), spread over the threads. `data` may hold old
/// values: what packing does not write (the padding pairs, the missing columns of a last
/// narrow panel) is zeroed.
///
/// # Safety
///
/// The CPU has AVX-512 F, BW and BF16; `k`, `n` ≥ 1; every element the view addresses lies
/// inside `rhs`; `data` holds `⌈n / NR⌉ · panel_pairs · NR` values.
pub(crate) unsafe fn pack_panels(
    data: &mut [u32],
    rhs: &[f32],
    view: View,
    (k, n): (usize, usize),
    panel_pairs: usize,
) {
    let pairs = k.div_ceil(2);
    let pack = |(p, panel): (usize, &mut [u32])| {
        let columns = NR.min(n - p * NR);
        if columns < NR {
            panel.fill(0);
        } else {
            panel[pairs * NR..].fill(0);
        }
        // SAFETY: the caller's guarantees (CPU features, view inside the slice); the panel
        // holds at least `pairs · NR` values.
        unsafe { pack_rhs(panel, rhs, view, k, p * NR, columns) }
    };
    if rayon::current_num_threads() > 1 {
        data.par_chunks_mut(panel_pairs * NR)
            .enumerate()
            .for_each(pack);
    } else {
        data.chunks_mut(panel_pairs * NR).enumerate().for_each(pack);
    }
}

/// `dst = (accumulate ? dst : 0) + lhs · rhs` with `rhs` already converted, on the kernel this
/// CPU runs ([`matmul`]'s choice).
///
/// # Safety
///
/// As [`matmul`]; `packed` holds a `[k, n]` operand converted with panels of a multiple of 16
/// pairs.
pub(crate) unsafe fn matmul_packed(
    m: usize,
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    (lhs, lhs_view): (&[f32], View),
    packed: &PackedRhs,
) {
    let shape = (m, packed.n, packed.k);
    if crate::bf16_amx::usable() {
        let threads = rayon::current_num_threads().max(1);
        // SAFETY: the caller's guarantees.
        unsafe {
            crate::bf16_amx::product(
                shape,
                threads,
                dst,
                dst_view,
                accumulate,
                (lhs, lhs_view),
                &packed.data,
                packed.panel_pairs,
            )
        }
    } else {
        // SAFETY: the caller's guarantees.
        unsafe { register_product(shape, dst, dst_view, accumulate, lhs, lhs_view, packed) }
    }
}

/// The register kernel's product over a converted right operand.
///
/// # Safety
///
/// As [`matmul`]; `packed` is the right operand converted.
unsafe fn register_product(
    (m, n, k): (usize, usize, usize),
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    lhs: &[f32],
    lhs_view: View,
    packed: &PackedRhs,
) {
    let threads = rayon::current_num_threads().max(1);
    // Enough row blocks for every thread; the block size does not change any sum.
    let mc = MC.min(m.div_ceil(threads).div_ceil(MR) * MR);
    let blocks = m.div_ceil(mc);
    let out = Destination {
        base: dst.as_mut_ptr(),
        view: dst_view,
    };
    let job = Job {
        n,
        k,
        accumulate,
        lhs,
        lhs_view,
        packed_rhs: &packed.data,
        panel_pairs: packed.panel_pairs,
        out,
    };
    let run = |block: usize| {
        let first = block * mc;
        // SAFETY: the caller's guarantees; blocks cover disjoint rows of the destination.
        unsafe { job.rows(first, mc.min(m - first)) }
    };
    if threads > 1 && blocks > 1 {
        (0..blocks).into_par_iter().for_each(run);
    } else {
        (0..blocks).for_each(run);
    }
}

/// The destination of a product, written by several threads at disjoint rows.
#[derive(Clone, Copy)]
pub(crate) struct Destination {
    pub(crate) base: *mut f32,
    pub(crate) view: View,
}

// SAFETY: threads write disjoint rows (each row block is one thread's), and the pointer outlives
// the parallel section (it is the caller's borrowed slice).
unsafe impl Send for Destination {}
unsafe impl Sync for Destination {}

/// What every row block of one product shares.
struct Job<'a> {
    n: usize,
    k: usize,
    accumulate: bool,
    lhs: &'a [f32],
    lhs_view: View,
    packed_rhs: &'a [u32],
    /// Pairs per panel of `packed_rhs`.
    panel_pairs: usize,
    out: Destination,
}

impl Job<'_> {
    /// Rows `first .. first + rows` of the destination.
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    unsafe fn rows(&self, first: usize, rows: usize) {
        let pairs = self.k.div_ceil(2);
        let row_panels = rows.div_ceil(MR);
        let mut packed_lhs = vec![0u32; row_panels * KC * MR];
        // Blocks of `k` of equal size (≤ KC pairs), fixed by `k` alone.
        let k_blocks = pairs.div_ceil(KC);
        let kc = pairs.div_ceil(k_blocks);
        for kb in 0..k_blocks {
            let p0 = kb * kc;
            let count = kc.min(pairs - p0);
            for rp in 0..row_panels {
                let r0 = rp * MR;
                let panel = &mut packed_lhs[rp * count * MR..(rp + 1) * count * MR];
                // SAFETY: the caller's guarantees.
                unsafe {
                    pack_lhs(
                        panel,
                        self.lhs,
                        self.lhs_view,
                        self.k,
                        (first + r0, MR.min(rows - r0)),
                        (p0, count),
                    )
                };
            }
            let overwrite = kb == 0 && !self.accumulate;
            for cp in 0..self.n.div_ceil(NR) {
                let c0 = cp * NR;
                let columns = NR.min(self.n - c0);
                let b = &self.packed_rhs[(cp * self.panel_pairs + p0) * NR..][..count * NR];
                for rp in 0..row_panels {
                    let r0 = rp * MR;
                    let a = &packed_lhs[rp * count * MR..][..count * MR];
                    // SAFETY: the caller's guarantees; the tile lies inside the destination.
                    unsafe {
                        kernel(
                            a,
                            b,
                            count,
                            self.out,
                            (first + r0, MR.min(rows - r0)),
                            (c0, columns),
                            overwrite,
                        )
                    };
                }
            }
        }
    }
}

/// Rows `rows.0 .. rows.0 + rows.1` (≤ MR) and pairs `pairs.0 .. pairs.0 + pairs.1` of `lhs`
/// into `panel`: pair `q`, row `r` at `q · MR + r`; missing rows and the missing member of a
/// last odd pair are zero.
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
unsafe fn pack_lhs(
    panel: &mut [u32],
    lhs: &[f32],
    view: View,
    k: usize,
    (r0, rows): (usize, usize),
    (p0, count): (usize, usize),
) {
    let at = |r: usize, c: usize| view.offset + r * view.row_stride + c * view.col_stride;
    panel.fill(0);
    if view.row_stride == 1 {
        // Rows side by side in memory (a transposed view): one vector per `k` index.
        for q in 0..count {
            let c = 2 * (p0 + q);
            let mask = lanes(rows);
            // SAFETY: the lanes read are rows r0 .. r0 + rows of column c (and c + 1), inside
            // the slice by the caller's guarantee.
            let low = unsafe { _mm512_maskz_loadu_ps(mask, lhs.as_ptr().add(at(r0, c))) };
            let high = if c + 1 < k {
                unsafe { _mm512_maskz_loadu_ps(mask, lhs.as_ptr().add(at(r0, c + 1))) }
            } else {
                _mm512_setzero_ps()
            };
            let lanes_value = _mm512_or_si512(round16(low), _mm512_slli_epi32::<16>(round16(high)));
            // SAFETY: `panel` holds `count · MR` values and MR ≤ 16 lanes are stored.
            unsafe {
                _mm512_mask_storeu_epi32(
                    panel.as_mut_ptr().add(q * MR).cast(),
                    lanes(MR),
                    lanes_value,
                )
            };
        }
    } else if view.col_stride == 1 {
        // Each row contiguous along `k`: its bfloat16 values in order are its pairs.
        for r in 0..rows {
            let row = &lhs[at(r0 + r, 0)..];
            pack_contiguous(row, k, (p0, count), |q, v| panel[q * MR + r] = v);
        }
    } else {
        for r in 0..rows {
            for q in 0..count {
                let c = 2 * (p0 + q);
                let high = if c + 1 < k {
                    lhs[at(r0 + r, c + 1)]
                } else {
                    0.0
                };
                panel[q * MR + r] = pair(lhs[at(r0 + r, c)], high);
            }
        }
    }
}

/// The pairs `p0 .. p0 + count` of a contiguous run of `k` values, handed to `put(q, pair)`
/// with `q` counted from `p0`.
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
pub(crate) fn pack_contiguous(
    run: &[f32],
    k: usize,
    (p0, count): (usize, usize),
    mut put: impl FnMut(usize, u32),
) {
    let start = 2 * p0;
    let end = k.min(2 * (p0 + count));
    let values = &run[start..end];
    let mut q = 0;
    let mut chunks = values.chunks_exact(32);
    for chunk in &mut chunks {
        // SAFETY: `chunk` holds 32 values.
        let (low, high) = unsafe {
            (
                _mm512_loadu_ps(chunk.as_ptr()),
                _mm512_loadu_ps(chunk.as_ptr().add(16)),
            )
        };
        // Sixteen lanes of bfloat16 from each half, packed two per 32-bit lane in order.
        let low = _mm512_cvtepi32_epi16(round16(low));
        let high = _mm512_cvtepi32_epi16(round16(high));
        let mut out = [0u32; 16];
        // SAFETY: `out` holds 64 bytes; two 32-byte stores.
        unsafe {
            _mm256_storeu_si256(out.as_mut_ptr().cast(), low);
            _mm256_storeu_si256(out.as_mut_ptr().add(8).cast(), high);
        }
        for v in out {
            put(q, v);
            q += 1;
        }
    }
    for two in chunks.remainder().chunks(2) {
        put(q, pair(two[0], two.get(1).copied().unwrap_or(0.0)));
        q += 1;
    }
}

/// Columns `c0 .. c0 + columns` (≤ NR) of `rhs`, every pair of `k`, into `panel`: pair `q`,
/// column `j` at `q · NR + j`; missing columns are zero.
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
pub(crate) unsafe fn pack_rhs(
    panel: &mut [u32],
    rhs: &[f32],
    view: View,
    k: usize,
    c0: usize,
    columns: usize,
) {
    let at = |r: usize, c: usize| view.offset + r * view.row_stride + c * view.col_stride;
    let pairs = k.div_ceil(2);
    if view.col_stride == 1 {
        // Rows contiguous along the columns: one vector per `k` index and 16 columns.
        for q in 0..pairs {
            let r = 2 * q;
            for half in 0..NR / 16 {
                let first = half * 16;
                if first >= columns {
                    break;
                }
                let mask = lanes(columns - first);
                // SAFETY: the lanes read are columns c0 + first .. c0 + columns of rows r and
                // r + 1, inside the slice by the caller's guarantee.
                let low =
                    unsafe { _mm512_maskz_loadu_ps(mask, rhs.as_ptr().add(at(r, c0 + first))) };
                let high = if r + 1 < k {
                    unsafe { _mm512_maskz_loadu_ps(mask, rhs.as_ptr().add(at(r + 1, c0 + first))) }
                } else {
                    _mm512_setzero_ps()
                };
                let value = _mm512_or_si512(round16(low), _mm512_slli_epi32::<16>(round16(high)));
                // SAFETY: `panel` holds `pairs · NR` values; 16 are stored at q · NR + first.
                unsafe {
                    _mm512_storeu_si512(panel.as_mut_ptr().add(q * NR + first).cast(), value)
                };
            }
        }
    } else if view.row_stride == 1 {
        // Each column contiguous along `k` (a transposed view).
        for j in 0..columns {
            let column = &rhs[at(0, c0 + j)..];
            pack_contiguous(column, k, (0, pairs), |q, v| panel[q * NR + j] = v);
        }
    } else {
        for j in 0..columns {
            for q in 0..pairs {
                let r = 2 * q;
                let high = if r + 1 < k {
                    rhs[at(r + 1, c0 + j)]
                } else {
                    0.0
                };
                panel[q * NR + j] = pair(rhs[at(r, c0 + j)], high);
            }
        }
    }
}

/// One `MR × NR` tile over `count` pairs: `a` holds `count · MR` row pairs, `b` `count · NR`
/// column pairs. Adds the sums to the destination tile at `(rows.0, cols.0)`, or writes them
/// when `overwrite`; only the first `rows.1` rows and `cols.1` columns exist.
#[inline]
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
unsafe fn kernel(
    a: &[u32],
    b: &[u32],
    count: usize,
    out: Destination,
    (r0, rows): (usize, usize),
    (c0, columns): (usize, usize),
    overwrite: bool,
) {
    let mut sums = [[_mm512_setzero_ps(); 2]; MR];
    let (a, b) = (&a[..count * MR], &b[..count * NR]);
    for q in 0..count {
        // SAFETY: `b` holds NR = 32 values at q · NR.
        let (b0, b1) = unsafe {
            (
                as_bh(_mm512_loadu_si512(b.as_ptr().add(q * NR).cast())),
                as_bh(_mm512_loadu_si512(b.as_ptr().add(q * NR + 16).cast())),
            )
        };
        let row_pairs = &a[q * MR..(q + 1) * MR];
        for (sum, &value) in sums.iter_mut().zip(row_pairs) {
            let a = as_bh(_mm512_set1_epi32(value as i32));
            sum[0] = _mm512_dpbf16_ps(sum[0], a, b0);
            sum[1] = _mm512_dpbf16_ps(sum[1], a, b1);
        }
    }
    let view = out.view;
    if view.col_stride == 1 {
        let masks = [lanes(columns), lanes(columns.saturating_sub(16))];
        for (r, sum) in sums.iter().enumerate().take(rows) {
            // SAFETY: the tile's existing elements lie inside the destination (caller).
            let row = unsafe { out.base.add(view.offset + (r0 + r) * view.row_stride + c0) };
            for (half, (&value, &mask)) in sum.iter().zip(&masks).enumerate() {
                if mask == 0 {
                    continue;
                }
                // SAFETY: as above; masked lanes are neither read nor written.
                unsafe {
                    let at = row.add(16 * half);
                    let value = if overwrite {
                        value
                    } else {
                        _mm512_add_ps(_mm512_maskz_loadu_ps(mask, at), value)
                    };
                    _mm512_mask_storeu_ps(at, mask, value);
                }
            }
        }
    } else {
        let mut tile = [[0f32; NR]; MR];
        for (row, sum) in tile.iter_mut().zip(&sums) {
            // SAFETY: `row` holds 32 values.
            unsafe {
                _mm512_storeu_ps(row.as_mut_ptr(), sum[0]);
                _mm512_storeu_ps(row.as_mut_ptr().add(16), sum[1]);
            }
        }
        for (r, row) in tile.iter().enumerate().take(rows) {
            for (j, &value) in row.iter().enumerate().take(columns) {
                let index = view.offset + (r0 + r) * view.row_stride + (c0 + j) * view.col_stride;
                // SAFETY: inside the destination (caller).
                unsafe {
                    let at = out.base.add(index);
                    *at = if overwrite { value } else { *at + value };
                }
            }
        }
    }
}

/// The same 512 bits read as 32 bfloat16 values.
#[inline]
#[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
fn as_bh(v: __m512i) -> __m512bh {
    // SAFETY: both are plain 512-bit vectors; every bit pattern is a valid value of either.
    unsafe { std::mem::transmute::<__m512i, __m512bh>(v) }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::MatmulPrecision;
    use crate::fused;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// True (with a note) when this CPU cannot run the products.
    fn skipped() -> bool {
        if available() {
            return false;
        }
        eprintln!("skipped: this CPU lacks AVX-512 BF16");
        true
    }

    /// The kernels this CPU runs: none without AVX-512 BF16; the register kernel; and the
    /// tile kernel where the CPU has AMX (else a note that it was not tested).
    fn kernels() -> Vec<Kernel> {
        if skipped() {
            return Vec::new();
        }
        if crate::bf16_amx::usable() {
            vec![Kernel::Registers, Kernel::Tiles]
        } else {
            eprintln!("note: no AMX here; the tile kernel is not tested on this CPU");
            vec![Kernel::Registers]
        }
    }

    /// How a matrix lies in its buffer.
    #[derive(Debug, Clone, Copy)]
    enum Layout {
        /// Rows contiguous, padded by 3 values.
        Rows,
        /// Columns contiguous (a transposed view), padded by 5 values.
        Columns,
        /// Neither stride 1: every other value of padded rows.
        Strided,
    }

    /// A random `[rows, cols]` matrix in `layout`, starting at offset 2 (values in ±1, now and
    /// then ±40, so that the rounding of large and small values both count).
    fn matrix(rng: &mut ChaCha8Rng, rows: usize, cols: usize, layout: Layout) -> (Vec<f32>, View) {
        let view = match layout {
            Layout::Rows => View {
                offset: 2,
                row_stride: cols + 3,
                col_stride: 1,
            },
            Layout::Columns => View {
                offset: 2,
                row_stride: 1,
                col_stride: rows + 5,
            },
            Layout::Strided => View {
                offset: 2,
                row_stride: 2 * cols + 1,
                col_stride: 2,
            },
        };
        let len = view.offset + (rows - 1) * view.row_stride + (cols - 1) * view.col_stride + 1;
        let values = (0..len)
            .map(|_| {
                let v: f32 = rng.random_range(-1.0..1.0);
                if rng.random_bool(0.05) {
                    40.0 * v
                } else {
                    v
                }
            })
            .collect();
        (values, view)
    }

    fn get(values: &[f32], view: View, r: usize, c: usize) -> f32 {
        values[view.offset + r * view.row_stride + c * view.col_stride]
    }

    /// One random product: the destination before and after, and per element the exact sum
    /// over the bf16-rounded operands, the exact sum over the f32 operands, and `Σ |a|·|b|`.
    struct Case {
        before: Vec<f32>,
        after: Vec<f32>,
        dst_view: View,
        rounded: Vec<f64>,
        unrounded: Vec<f64>,
        magnitude: Vec<f64>,
    }

    #[allow(clippy::too_many_arguments)]
    fn run(
        rng: &mut ChaCha8Rng,
        (m, n, k): (usize, usize, usize),
        layouts: [Layout; 3],
        accumulate: bool,
        kernel: Option<Kernel>,
    ) -> Case {
        let (lhs, lhs_view) = matrix(rng, m, k, layouts[0]);
        let (rhs, rhs_view) = matrix(rng, k, n, layouts[1]);
        let (before, dst_view) = matrix(rng, m, n, layouts[2]);
        let mut after = before.clone();
        match kernel {
            // The f32 product, through the function the fused layers call.
            None => fused::matmul(
                MatmulPrecision::F32,
                (m, n, k),
                &mut after,
                dst_view,
                accumulate,
                &lhs,
                lhs_view,
                &rhs,
                rhs_view,
            )
            .unwrap(),
            // SAFETY: the kernel runs on this CPU (`kernels`); m, n, k ≥ 1 and the views
            // lie inside their buffers (`matrix`); destination rows are distinct.
            Some(kernel) => unsafe {
                matmul_with(
                    kernel,
                    (m, n, k),
                    &mut after,
                    dst_view,
                    accumulate,
                    &lhs,
                    lhs_view,
                    &rhs,
                    rhs_view,
                )
            },
        }
        let round = |v: f32| f64::from(from_bf16(to_bf16(v)));
        let (mut rounded, mut unrounded, mut magnitude) = (vec![], vec![], vec![]);
        for i in 0..m {
            for j in 0..n {
                let start = if accumulate {
                    f64::from(get(&before, dst_view, i, j))
                } else {
                    0.0
                };
                let (mut r, mut u, mut a) = (start, start, start.abs());
                for p in 0..k {
                    let (x, y) = (get(&lhs, lhs_view, i, p), get(&rhs, rhs_view, p, j));
                    r += round(x) * round(y);
                    u += f64::from(x) * f64::from(y);
                    a += f64::from(x.abs()) * f64::from(y.abs());
                }
                rounded.push(r);
                unrounded.push(u);
                magnitude.push(a);
            }
        }
        Case {
            before,
            after,
            dst_view,
            rounded,
            unrounded,
            magnitude,
        }
    }

    const LAYOUTS: [[Layout; 3]; 5] = [
        [Layout::Rows, Layout::Rows, Layout::Rows],
        [Layout::Columns, Layout::Rows, Layout::Rows],
        [Layout::Rows, Layout::Columns, Layout::Rows],
        [Layout::Strided, Layout::Strided, Layout::Strided],
        [Layout::Columns, Layout::Columns, Layout::Columns],
    ];

    /// Shapes around every edge: one row, column or pair; odd `k`; `k` across a block; tiles
    /// of rows and columns with a ragged rest; more than one row block.
    fn shapes() -> Vec<(usize, usize, usize)> {
        let mut shapes = Vec::new();
        for &m in &[1, 2, 13, 14, 15, 29, 350] {
            for &n in &[1, 5, 16, 31, 32, 33, 70] {
                for &k in &[1, 2, 3, 7, 255, 256, 257, 517] {
                    shapes.push((m, n, k));
                }
            }
        }
        shapes
    }

    #[test]
    fn products_match_exact_sums_of_the_rounded_operands() {
        for kernel in kernels() {
            products_match_exact_sums_with(kernel);
        }
    }

    fn products_match_exact_sums_with(kernel: Kernel) {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        for (index, shape) in shapes().into_iter().enumerate() {
            let layouts = LAYOUTS[index % LAYOUTS.len()];
            let accumulate = index % 2 == 1;
            let case = run(&mut rng, shape, layouts, accumulate, Some(kernel));
            let (m, n, _) = shape;
            for i in 0..m {
                for j in 0..n {
                    let e = i * n + j;
                    let got = f64::from(get(&case.after, case.dst_view, i, j));
                    // Only the f32 sums differ from the exact ones: a relative 1e-5 of the
                    // magnitude of the terms covers their rounding.
                    let tolerance = 1e-5 * case.magnitude[e] + 1e-30;
                    assert!(
                        (got - case.rounded[e]).abs() <= tolerance,
                        "{kernel:?} {shape:?} {layouts:?} accumulate {accumulate}, element ({i}, {j}): {got} vs {}",
                        case.rounded[e]
                    );
                }
            }
            // Nothing outside the destination view changes.
            let mut inside = vec![false; case.before.len()];
            for i in 0..m {
                for j in 0..n {
                    inside[case.dst_view.offset
                        + i * case.dst_view.row_stride
                        + j * case.dst_view.col_stride] = true;
                }
            }
            for (e, (&b, &a)) in case.before.iter().zip(&case.after).enumerate() {
                assert!(
                    inside[e] || b.to_bits() == a.to_bits(),
                    "{kernel:?} {shape:?}: value {e} outside the view changed"
                );
            }
        }
    }

    #[test]
    fn products_stay_within_the_rounding_bound_of_the_f32_product() {
        for kernel in kernels() {
            let mut rng = ChaCha8Rng::seed_from_u64(8);
            for (index, shape) in shapes().into_iter().enumerate().step_by(3) {
                let layouts = LAYOUTS[index % LAYOUTS.len()];
                within_the_rounding_bound(&mut rng, kernel, shape, layouts);
            }
        }
    }

    fn within_the_rounding_bound(
        rng: &mut ChaCha8Rng,
        kernel: Kernel,
        shape: (usize, usize, usize),
        layouts: [Layout; 3],
    ) {
        {
            let case = run(rng, shape, layouts, false, Some(kernel));
            let (m, n, _) = shape;
            for i in 0..m {
                for j in 0..n {
                    let e = i * n + j;
                    let got = f64::from(get(&case.after, case.dst_view, i, j));
                    // Each operand is off by at most 2⁻⁹ relative, a product by about 2·2⁻⁹.
                    let bound = 2.0 * 2f64.powi(-8) * case.magnitude[e];
                    assert!(
                        (got - case.unrounded[e]).abs() <= bound,
                        "{kernel:?} {shape:?} element ({i}, {j}): {got} vs {}",
                        case.unrounded[e]
                    );
                }
            }
        }
    }

    #[test]
    fn f32_precision_is_the_f32_product() {
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let (m, n) = (29, 33);
        let case = run(&mut rng, (m, n, 257), LAYOUTS[1], true, None);
        for e in 0..m * n {
            let got = f64::from(get(&case.after, case.dst_view, e / n, e % n));
            let exact = case.unrounded[e];
            assert!(
                (got - exact).abs() <= 1e-5 * case.magnitude[e],
                "{got} vs {exact}"
            );
        }
    }

    #[test]
    fn results_do_not_depend_on_the_thread_count() {
        for kernel in kernels() {
            same_at_one_and_two_threads(kernel);
        }
    }

    fn same_at_one_and_two_threads(kernel: Kernel) {
        for (shape, layouts) in [
            ((700, 100, 300), LAYOUTS[0]),
            ((384, 70, 1001), LAYOUTS[1]),
            ((1001, 45, 384), LAYOUTS[2]),
        ] {
            let products: Vec<Vec<u32>> = [1, 2]
                .iter()
                .map(|&threads| {
                    let pool = rayon::ThreadPoolBuilder::new()
                        .num_threads(threads)
                        .build()
                        .unwrap();
                    pool.install(|| {
                        let mut rng = ChaCha8Rng::seed_from_u64(10);
                        let case = run(&mut rng, shape, layouts, true, Some(kernel));
                        case.after.iter().map(|v| v.to_bits()).collect()
                    })
                })
                .collect();
            assert!(
                products[0] == products[1],
                "{kernel:?} {shape:?}: 1 and 2 threads differ"
            );
        }
    }

    #[test]
    fn rounding_is_to_nearest_with_ties_to_even() {
        // IEEE 754 round-to-nearest-even on the bit pattern; bfloat16 is the upper 16 bits of
        // binary32 (common practice).
        for (bits, expected) in [
            (0x3F80_0000u32, 0x3F80u16), // 1
            (0x3F80_8000, 0x3F80),       // tie, kept half even: down
            (0x3F81_8000, 0x3F82),       // tie, kept half odd: up
            (0x3F80_8001, 0x3F81),       // above a tie: up
            (0x3F80_7FFF, 0x3F80),       // below a tie: down
            (0xBF81_8000, 0xBF82),       // negative tie: away from zero to the even half
            (0x7F7F_FFFF, 0x7F80),       // the largest float32 rounds to infinity
            (0x7F80_0000, 0x7F80),       // infinity
            (0xFF80_0000, 0xFF80),
            (0x8000_0000, 0x8000), // −0
            (0x0001_8000, 0x0002), // subnormal tie, odd: up (subnormals are kept)
        ] {
            assert_eq!(to_bf16(f32::from_bits(bits)), expected, "{bits:#010x}");
        }
        assert_eq!(to_bf16(f32::NAN), 0x7FC0);
    }

    #[test]
    fn rounding_matches_torch() {
        let fixture: serde_json::Value =
            serde_json::from_str(include_str!("../tests/fixtures/bf16_rounding_torch.json"))
                .unwrap();
        let cases = fixture["cases"].as_array().unwrap();
        assert!(cases.len() > 200);
        for case in cases {
            let bits = case[0].as_u64().unwrap() as u32;
            let expected = case[1].as_u64().unwrap() as u16;
            let x = f32::from_bits(bits);
            let got = to_bf16(x);
            if x.is_nan() {
                assert!(from_bf16(got).is_nan() && from_bf16(expected).is_nan());
            } else {
                assert_eq!(got, expected, "{bits:#010x}");
            }
        }
    }

    #[test]
    fn vector_rounding_gives_the_scalar_bits() {
        if skipped() {
            return;
        }
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let mut values: Vec<f32> = (0..4096).map(|_| f32::from_bits(rng.random())).collect();
        values.extend([
            f32::NAN,
            f32::INFINITY,
            -0.0,
            f32::MAX,
            f32::MIN_POSITIVE / 3.0,
        ]);
        for chunk in values.chunks(16) {
            let mut lanes = [0f32; 16];
            lanes[..chunk.len()].copy_from_slice(chunk);
            let mut out = [0u32; 16];
            // SAFETY: the CPU has the features (checked); `out` holds 16 lanes.
            unsafe {
                let v = _mm512_loadu_ps(lanes.as_ptr());
                _mm512_storeu_si512(out.as_mut_ptr().cast(), round16(v));
            }
            for (&x, &got) in lanes.iter().zip(&out) {
                assert_eq!(got, u32::from(to_bf16(x)), "{:#010x}", x.to_bits());
            }
        }
    }
}

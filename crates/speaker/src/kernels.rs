//! Per-frame kernels of the top-N frame posteriors and of the Baum–Welch sums: choosing a
//! frame's top Gaussians from their f32 scores, the f64 score of one chosen Gaussian, and
//! y += α·x on a row of first-order statistics.
//!
//! Each has an AVX-512 version, an AVX2 + FMA version (both chosen at run time: the portable
//! build may only assume SSE2) and a plain one. What they compute:
//!
//! * **Selection** ([`select_top`]): the same set in every version, exactly (it compares the
//!   same f32 values): of the `top` largest scores, those at most `gap` below the largest, ties
//!   at the boundary resolved towards lower indices, in index order. The vector versions find
//!   the largest score, write the candidates within the gap side by side (a compress or a loop
//!   over the bits of a mask) and, when there are more than `top`, count for every candidate
//!   the candidates strictly above it, a vector of counts per 16 (or 8) candidates, each
//!   candidate's value compared with all of them: no branches on the values and no sorting.
//!   Those with fewer than `top` above are kept; when that is not exactly `top` of them (ties at
//!   the boundary) the plain version decides. The plain version partitions by quick-select.
//! * **Score** ([`score`]): g + Σ_d x_d·(a_d + x_d·b_d) in f64, as eight partial sums (over
//!   d mod 8) of fused multiply-adds reduced in a fixed tree; AVX-512 and AVX2 give identical
//!   bits, the plain version (separate multiply and add) differs from them by rounding only.
//! * **Axpy** ([`axpy`]): y_d += α·x_d, fused in the vector versions (rounded once), a multiply
//!   and an add in the plain one.

use std::cmp::Ordering;

/// The instruction sets a kernel may use, detected once per call site (the detection macro
/// caches its answer).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Level {
    /// AVX-512 F (with AVX2 and FMA).
    Avx512,
    /// AVX2 and FMA.
    Avx2,
    /// Neither: plain Rust.
    Portable,
}

impl Level {
    /// The best level this processor supports.
    pub(crate) fn detect() -> Level {
        #[cfg(target_arch = "x86_64")]
        {
            let avx2 = std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma");
            if avx2 && std::arch::is_x86_feature_detected!("avx512f") {
                return Level::Avx512;
            }
            if avx2 {
                return Level::Avx2;
            }
        }
        Level::Portable
    }

    /// This level, or a lower one if the processor lacks it (for tests that force a level).
    #[cfg(test)]
    pub(crate) fn at_most(self, other: Level) -> Level {
        let rank = |l: Level| match l {
            Level::Portable => 0,
            Level::Avx2 => 1,
            Level::Avx512 => 2,
        };
        if rank(other) < rank(self) {
            other
        } else {
            self
        }
    }
}

/// Candidates the vector versions of [`select_top`] rank at most (more go to the plain one).
const MAX_RANKED: usize = 512;

/// Reusable buffers of [`select_top`].
#[derive(Debug, Default)]
pub(crate) struct SelectionWork {
    values: Vec<f32>,
    indices: Vec<i32>,
}

/// The Gaussians of a frame that get a posterior, written to `out` as (f32 score, index) in
/// index order: of the `top` largest values of `row`, those at most `gap` below the largest (a
/// NaN counts as −∞; of values tied at the boundary the lower indices are kept). When the
/// largest value is not finite (all −∞ or NaN, or a +∞) the plain version decides.
pub(crate) fn select_top(
    level: Level,
    row: &[f32],
    top: usize,
    gap: f32,
    out: &mut Vec<(f32, usize)>,
    work: &mut SelectionWork,
) {
    out.clear();
    if top == 0 || row.is_empty() {
        return;
    }
    #[cfg(target_arch = "x86_64")]
    {
        // Indices travel as i32 lanes.
        if row.len() < i32::MAX as usize {
            let done = match level {
                // SAFETY: `Level::detect` found these instruction sets (or a test chose a level
                // no higher than the detected one).
                Level::Avx512 => unsafe { select_top_avx512(row, top, gap, out, work) },
                Level::Avx2 => unsafe { select_top_avx2(row, top, gap, out, work) },
                Level::Portable => false,
            };
            if done {
                return;
            }
        }
    }
    let _ = level;
    select_top_portable(row, top, gap, out, &mut work.values);
}

/// The plain version of [`select_top`] (also used by the vector ones when the largest value is
/// not finite).
pub(crate) fn select_top_portable(
    row: &[f32],
    top: usize,
    gap: f32,
    out: &mut Vec<(f32, usize)>,
    values: &mut Vec<f32>,
) {
    out.clear();
    if top == 0 {
        return;
    }
    let best = row.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let floor = best - gap;
    // NaN fails `>=`: never a candidate (unless every value is NaN or −∞: then nothing is).
    out.extend(
        row.iter()
            .copied()
            .zip(0..)
            .filter(|&(v, _)| v >= floor && v > f32::NEG_INFINITY),
    );
    if out.len() <= top {
        return;
    }
    values.clear();
    values.extend(out.iter().map(|&(v, _)| v));
    let (_, &mut threshold, _) =
        values.select_nth_unstable_by(top - 1, |a, b| b.partial_cmp(a).unwrap_or(Ordering::Equal));
    let above = values.iter().filter(|&&v| v > threshold).count();
    let mut ties = top - above;
    out.retain(|&(v, _)| {
        if v > threshold {
            true
        } else if v == threshold && ties > 0 {
            ties -= 1;
            true
        } else {
            false
        }
    });
}

/// AVX-512 [`select_top`]; returns false (having written nothing) when the largest value is
/// not finite.
///
/// # Safety
/// The processor must support AVX-512 F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma,popcnt")]
unsafe fn select_top_avx512(
    row: &[f32],
    top: usize,
    gap: f32,
    out: &mut Vec<(f32, usize)>,
    work: &mut SelectionWork,
) -> bool {
    use std::arch::x86_64::*;
    const LANES: usize = 16;
    let n = row.len();
    let chunks = n.div_ceil(LANES);
    let lane_mask = |chunk: usize| -> __mmask16 {
        let left = n - chunk * LANES;
        if left >= LANES {
            0xffff
        } else {
            ((1u32 << left) - 1) as __mmask16
        }
    };
    let negative_infinity = _mm512_set1_ps(f32::NEG_INFINITY);
    let p = row.as_ptr();
    let mut best = negative_infinity;
    for chunk in 0..chunks {
        // SAFETY: the mask covers only lanes inside `row`.
        let v = unsafe {
            _mm512_mask_loadu_ps(negative_infinity, lane_mask(chunk), p.add(chunk * LANES))
        };
        // max(v, best) returns `best` where v is NaN: NaN is never the largest.
        best = _mm512_max_ps(v, best);
    }
    let best = _mm512_reduce_max_ps(best);
    if !best.is_finite() {
        return false;
    }
    let floor = _mm512_set1_ps(best - gap);
    // Candidates side by side, padded to whole vectors with −∞.
    // Room for every value and one vector more; what the buffers held before is overwritten
    // before it is read.
    if work.values.len() < chunks * LANES + LANES {
        work.values
            .resize(chunks * LANES + LANES, f32::NEG_INFINITY);
        work.indices.resize(chunks * LANES + LANES, 0);
    }
    let (cv, ci) = (work.values.as_mut_ptr(), work.indices.as_mut_ptr());
    let mut count = 0usize;
    let step = _mm512_set1_epi32(LANES as i32);
    let mut index = _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15);
    for chunk in 0..chunks {
        // SAFETY: as above; the stores write 16 values from `count` ≤ chunks·16 on, inside
        // the buffers of chunks·16 + 16.
        unsafe {
            let v = _mm512_mask_loadu_ps(negative_infinity, lane_mask(chunk), p.add(chunk * LANES));
            let keep = _mm512_cmp_ps_mask::<_CMP_GE_OQ>(v, floor);
            // Compress in registers, then a full store (a compress straight to memory is
            // slow on some processors); the next store overwrites the lanes after the kept.
            _mm512_storeu_ps(cv.add(count), _mm512_maskz_compress_ps(keep, v));
            _mm512_storeu_si512(
                ci.add(count).cast(),
                _mm512_maskz_compress_epi32(keep, index),
            );
            count += keep.count_ones() as usize;
        }
        index = _mm512_add_epi32(index, step);
    }
    // The lanes after the candidates hold what the last store (or an earlier frame) left: make
    // the next vector of them −∞ (all the ranks read), so that they
    // never rank above a candidate.
    // SAFETY: count + 16 ≤ chunks·16 + 16, the buffer's length.
    unsafe { _mm512_storeu_ps(cv.add(count), negative_infinity) };
    out.reserve(top.min(count));
    if count <= top {
        for k in 0..count {
            out.push((work.values[k], work.indices[k] as usize));
        }
        return true;
    }
    // Rank of each candidate by the values strictly above it, sixteen candidates per vector:
    // every candidate's value is compared with all of them (−∞ padding never counts).
    let candidate_chunks = count.div_ceil(LANES);
    let mut ranks = [_mm512_setzero_si512(); MAX_RANKED / LANES];
    if candidate_chunks > ranks.len() {
        return false;
    }
    let one = _mm512_set1_epi32(1);
    for k in 0..count {
        // SAFETY: k < count ≤ the buffer's length.
        let b = _mm512_set1_ps(unsafe { *cv.add(k) });
        for (chunk, rank) in ranks.iter_mut().enumerate().take(candidate_chunks) {
            // SAFETY: chunk·16 + 16 ≤ count + 16 ≤ the buffer's length.
            let v = unsafe { _mm512_loadu_ps(cv.add(chunk * LANES)) };
            let above = _mm512_cmp_ps_mask::<_CMP_LT_OQ>(v, b);
            *rank = _mm512_mask_add_epi32(*rank, above, *rank, one);
        }
    }
    let limit = _mm512_set1_epi32(top as i32);
    let mut kept = 0usize;
    let mut kept_values = [0.0f32; MAX_RANKED + LANES];
    let mut kept_indices = [0i32; MAX_RANKED + LANES];
    for (chunk, &rank) in ranks.iter().enumerate().take(candidate_chunks) {
        let valid = if count - chunk * LANES >= LANES {
            0xffff
        } else {
            ((1u32 << (count - chunk * LANES)) - 1) as __mmask16
        };
        let keep = _mm512_mask_cmplt_epi32_mask(valid, rank, limit);
        if kept + LANES > kept_values.len() {
            break;
        }
        // SAFETY: chunk·16 + 16 ≤ the buffers' lengths; kept + 16 fits (checked above).
        unsafe {
            let v = _mm512_loadu_ps(cv.add(chunk * LANES));
            let i = _mm512_loadu_si512(ci.add(chunk * LANES).cast());
            _mm512_storeu_ps(
                kept_values.as_mut_ptr().add(kept),
                _mm512_maskz_compress_ps(keep, v),
            );
            _mm512_storeu_si512(
                kept_indices.as_mut_ptr().add(kept).cast(),
                _mm512_maskz_compress_epi32(keep, i),
            );
        }
        kept += keep.count_ones() as usize;
    }
    // With distinct values exactly `top` candidates have fewer than `top` above them; more
    // means ties at the boundary: the plain version resolves them by index.
    if kept != top {
        return false;
    }
    out.extend(
        kept_values[..kept]
            .iter()
            .zip(&kept_indices[..kept])
            .map(|(&v, &i)| (v, i as usize)),
    );
    true
}

/// AVX2 [`select_top`]; returns false (having written nothing) when the largest value is not
/// finite.
///
/// # Safety
/// The processor must support AVX2.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma,popcnt")]
unsafe fn select_top_avx2(
    row: &[f32],
    top: usize,
    gap: f32,
    out: &mut Vec<(f32, usize)>,
    work: &mut SelectionWork,
) -> bool {
    use std::arch::x86_64::*;
    const LANES: usize = 8;
    let n = row.len();
    let whole = n / LANES * LANES;
    let p = row.as_ptr();
    let mut best_vector = _mm256_set1_ps(f32::NEG_INFINITY);
    for start in (0..whole).step_by(LANES) {
        // SAFETY: start + 8 ≤ n.
        let v = unsafe { _mm256_loadu_ps(p.add(start)) };
        best_vector = _mm256_max_ps(v, best_vector);
    }
    let mut lanes = [0.0f32; LANES];
    // SAFETY: `lanes` holds 8 values.
    unsafe { _mm256_storeu_ps(lanes.as_mut_ptr(), best_vector) };
    let mut best = lanes.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    for &v in &row[whole..] {
        best = best.max(v);
    }
    if !best.is_finite() {
        return false;
    }
    let floor_value = best - gap;
    let floor = _mm256_set1_ps(floor_value);
    work.values.clear();
    work.indices.clear();
    for start in (0..whole).step_by(LANES) {
        // SAFETY: start + 8 ≤ n.
        let v = unsafe { _mm256_loadu_ps(p.add(start)) };
        let mut keep = _mm256_movemask_ps(_mm256_cmp_ps::<_CMP_GE_OQ>(v, floor)) as u32;
        while keep != 0 {
            let lane = keep.trailing_zeros() as usize;
            work.values.push(row[start + lane]);
            work.indices.push((start + lane) as i32);
            keep &= keep - 1;
        }
    }
    for (i, &v) in row.iter().enumerate().skip(whole) {
        if v >= floor_value {
            work.values.push(v);
            work.indices.push(i as i32);
        }
    }
    let count = work.values.len();
    out.reserve(top.min(count));
    if count <= top {
        out.extend(
            work.values
                .iter()
                .zip(&work.indices)
                .map(|(&v, &i)| (v, i as usize)),
        );
        return true;
    }
    // Rank of each candidate by the values strictly above it, eight candidates per vector:
    // every candidate's value is compared with all of them (−∞ padding never counts).
    let candidate_chunks = count.div_ceil(LANES);
    work.values
        .resize(candidate_chunks * LANES, f32::NEG_INFINITY);
    let cv = work.values.as_ptr();
    let mut ranks = [_mm256_setzero_si256(); MAX_RANKED / LANES];
    if candidate_chunks > ranks.len() {
        return false;
    }
    for k in 0..count {
        // SAFETY: k < count ≤ the buffer's length.
        let b = _mm256_set1_ps(unsafe { *cv.add(k) });
        for (chunk, rank) in ranks.iter_mut().enumerate().take(candidate_chunks) {
            // SAFETY: the buffer holds candidate_chunks·8 values.
            let v = unsafe { _mm256_loadu_ps(cv.add(chunk * LANES)) };
            // All ones (−1) where b is above: subtracting counts it.
            let above = _mm256_castps_si256(_mm256_cmp_ps::<_CMP_GT_OQ>(b, v));
            *rank = _mm256_sub_epi32(*rank, above);
        }
    }
    let limit = _mm256_set1_epi32(top as i32);
    let before = out.len();
    for (chunk, &rank) in ranks.iter().enumerate().take(candidate_chunks) {
        let mut keep =
            _mm256_movemask_ps(_mm256_castsi256_ps(_mm256_cmpgt_epi32(limit, rank))) as u32;
        while keep != 0 {
            let k = chunk * LANES + keep.trailing_zeros() as usize;
            if k < count {
                out.push((work.values[k], work.indices[k] as usize));
            }
            keep &= keep - 1;
        }
    }
    // With distinct values exactly `top` candidates have fewer than `top` above them; more
    // means ties at the boundary: the plain version resolves them by index.
    if out.len() - before != top {
        out.clear();
        return false;
    }
    true
}

/// Lanes of the f64 partial sums of [`score`].
pub(crate) const SCORE_LANES: usize = 8;

/// `dims` rounded up to whole [`SCORE_LANES`]: the stride of the per-Gaussian weights
/// [`score`] takes.
pub(crate) fn padded(dims: usize) -> usize {
    dims.div_ceil(SCORE_LANES) * SCORE_LANES
}

/// g + Σ_d x_d·(a_d + x_d·b_d) in f64, where `weights` holds a (`padded(D)` values, zeros after
/// the first D) then b (likewise) and `x` holds D values. See the module doc for the order of
/// the arithmetic.
pub(crate) fn score(level: Level, offset: f64, x: &[f64], weights: &[f64]) -> f64 {
    let stride = padded(x.len());
    assert!(weights.len() >= 2 * stride);
    #[cfg(target_arch = "x86_64")]
    {
        match level {
            // SAFETY: the level was detected (see `select_top`); lengths are asserted above.
            Level::Avx512 => return unsafe { score_avx512(offset, x, weights, stride) },
            Level::Avx2 => return unsafe { score_avx2(offset, x, weights, stride) },
            Level::Portable => {}
        }
    }
    let _ = level;
    score_portable(offset, x, weights, stride)
}

fn score_portable(offset: f64, x: &[f64], weights: &[f64], stride: usize) -> f64 {
    let (linear, quadratic) = weights[..2 * stride].split_at(stride);
    let mut partial = [0.0f64; SCORE_LANES];
    for (d, &v) in x.iter().enumerate() {
        partial[d % SCORE_LANES] += v * (linear[d] + v * quadratic[d]);
    }
    offset + reduce_eight(partial)
}

/// ((s0 + s4) + (s2 + s6)) + ((s1 + s5) + (s3 + s7)): the tree the vector versions reduce in.
fn reduce_eight(s: [f64; SCORE_LANES]) -> f64 {
    ((s[0] + s[4]) + (s[2] + s[6])) + ((s[1] + s[5]) + (s[3] + s[7]))
}

/// # Safety
/// AVX-512 F; `weights` holds 2·stride values, stride = padded(x.len()).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn score_avx512(offset: f64, x: &[f64], weights: &[f64], stride: usize) -> f64 {
    use std::arch::x86_64::*;
    let dims = x.len();
    let (xp, wp) = (x.as_ptr(), weights.as_ptr());
    let mut sums = _mm512_setzero_pd();
    for start in (0..stride).step_by(SCORE_LANES) {
        let left = dims.saturating_sub(start).min(SCORE_LANES);
        let mask = ((1u32 << left) - 1) as __mmask8;
        // SAFETY: the mask keeps the loads of x inside it; the weights hold 2·stride values.
        unsafe {
            let v = _mm512_maskz_loadu_pd(mask, xp.add(start));
            let a = _mm512_loadu_pd(wp.add(start));
            let b = _mm512_loadu_pd(wp.add(stride + start));
            sums = _mm512_fmadd_pd(v, _mm512_fmadd_pd(v, b, a), sums);
        }
    }
    let mut lanes = [0.0f64; SCORE_LANES];
    // SAFETY: `lanes` holds 8 values.
    unsafe { _mm512_storeu_pd(lanes.as_mut_ptr(), sums) };
    offset + reduce_eight(lanes)
}

/// # Safety
/// AVX2 and FMA; `weights` holds 2·stride values, stride = padded(x.len()).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn score_avx2(offset: f64, x: &[f64], weights: &[f64], stride: usize) -> f64 {
    use std::arch::x86_64::*;
    let dims = x.len();
    let (xp, wp) = (x.as_ptr(), weights.as_ptr());
    let mut low = _mm256_setzero_pd();
    let mut high = _mm256_setzero_pd();
    let mask = |start: usize| {
        let left = dims.saturating_sub(start) as i64;
        _mm256_setr_epi64x(
            if left > 0 { -1 } else { 0 },
            if left > 1 { -1 } else { 0 },
            if left > 2 { -1 } else { 0 },
            if left > 3 { -1 } else { 0 },
        )
    };
    for start in (0..stride).step_by(SCORE_LANES) {
        // SAFETY: the masks keep the loads of x inside it; the weights hold 2·stride values.
        unsafe {
            let v0 = if start + 4 <= dims {
                _mm256_loadu_pd(xp.add(start))
            } else {
                _mm256_maskload_pd(xp.add(start), mask(start))
            };
            let v1 = if start + 8 <= dims {
                _mm256_loadu_pd(xp.add(start + 4))
            } else {
                _mm256_maskload_pd(xp.add(start + 4), mask(start + 4))
            };
            let a0 = _mm256_loadu_pd(wp.add(start));
            let a1 = _mm256_loadu_pd(wp.add(start + 4));
            let b0 = _mm256_loadu_pd(wp.add(stride + start));
            let b1 = _mm256_loadu_pd(wp.add(stride + start + 4));
            low = _mm256_fmadd_pd(v0, _mm256_fmadd_pd(v0, b0, a0), low);
            high = _mm256_fmadd_pd(v1, _mm256_fmadd_pd(v1, b1, a1), high);
        }
    }
    let mut lanes = [0.0f64; SCORE_LANES];
    // SAFETY: `lanes` holds 8 values.
    unsafe {
        _mm256_storeu_pd(lanes.as_mut_ptr(), low);
        _mm256_storeu_pd(lanes.as_mut_ptr().add(4), high);
    }
    offset + reduce_eight(lanes)
}

/// y += α·x (same lengths).
pub(crate) fn axpy(level: Level, alpha: f64, x: &[f64], y: &mut [f64]) {
    assert_eq!(x.len(), y.len());
    #[cfg(target_arch = "x86_64")]
    {
        match level {
            // SAFETY: the level was detected; lengths are equal (asserted).
            Level::Avx512 => return unsafe { axpy_avx512(alpha, x, y) },
            Level::Avx2 => return unsafe { axpy_avx2(alpha, x, y) },
            Level::Portable => {}
        }
    }
    let _ = level;
    for (y, &x) in y.iter_mut().zip(x) {
        *y += alpha * x;
    }
}

/// # Safety
/// AVX-512 F; `x` and `y` of the same length.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn axpy_avx512(alpha: f64, x: &[f64], y: &mut [f64]) {
    use std::arch::x86_64::*;
    let n = x.len();
    let a = _mm512_set1_pd(alpha);
    let (xp, yp) = (x.as_ptr(), y.as_mut_ptr());
    for start in (0..n).step_by(8) {
        let left = (n - start).min(8);
        let mask = ((1u32 << left) - 1) as __mmask8;
        // SAFETY: the mask keeps every access inside the slices.
        unsafe {
            let v = _mm512_maskz_loadu_pd(mask, xp.add(start));
            let w = _mm512_maskz_loadu_pd(mask, yp.add(start));
            _mm512_mask_storeu_pd(yp.add(start), mask, _mm512_fmadd_pd(a, v, w));
        }
    }
}

/// # Safety
/// AVX2 and FMA; `x` and `y` of the same length.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn axpy_avx2(alpha: f64, x: &[f64], y: &mut [f64]) {
    use std::arch::x86_64::*;
    let n = x.len();
    let whole = n / 4 * 4;
    let a = _mm256_set1_pd(alpha);
    let (xp, yp) = (x.as_ptr(), y.as_mut_ptr());
    for start in (0..whole).step_by(4) {
        // SAFETY: start + 4 ≤ n.
        unsafe {
            let v = _mm256_loadu_pd(xp.add(start));
            let w = _mm256_loadu_pd(yp.add(start));
            _mm256_storeu_pd(yp.add(start), _mm256_fmadd_pd(a, v, w));
        }
    }
    for d in whole..n {
        y[d] = alpha.mul_add(x[d], y[d]);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn levels() -> Vec<Level> {
        let best = Level::detect();
        let mut out = vec![Level::Portable];
        for level in [Level::Avx2, Level::Avx512] {
            if level.at_most(best) == level {
                out.push(level);
            }
        }
        out
    }

    #[test]
    fn every_level_selects_the_same_gaussians() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut work = SelectionWork::default();
        let (mut expected, mut found, mut values) = (Vec::new(), Vec::new(), Vec::new());
        for case in 0..4000 {
            let n = [1, 3, 8, 15, 16, 17, 39, 64, 127, 128, 200][case % 11];
            let top = 1 + case % 20;
            let spread = [5.0f32, 40.0, 120.0][case % 3];
            // Coarse values (multiples of 1/4) so that ties are frequent.
            let mut row: Vec<f32> = (0..n)
                .map(|_| (rng.random_range(-spread..0.0f32) * 4.0).round() / 4.0 - 30.0)
                .collect();
            if case % 7 == 0 {
                row[case % n] = f32::NAN;
            }
            if case % 13 == 0 {
                row[(case / 13) % n] = f32::NEG_INFINITY;
            }
            select_top_portable(&row, top, 40.0, &mut expected, &mut values);
            for level in levels() {
                select_top(level, &row, top, 40.0, &mut found, &mut work);
                assert_eq!(
                    found, expected,
                    "case {case}, {level:?}, top {top}: {row:?}"
                );
            }
        }
        // No finite value: nothing is chosen at any level; +∞ goes to the plain version.
        for row in [
            vec![f32::NEG_INFINITY; 20],
            vec![f32::NAN; 20],
            vec![0.0, f32::INFINITY, 1.0],
        ] {
            select_top_portable(&row, 4, 40.0, &mut expected, &mut values);
            for level in levels() {
                select_top(level, &row, 4, 40.0, &mut found, &mut work);
                assert_eq!(found, expected, "{level:?}: {row:?}");
            }
        }
    }

    #[test]
    fn the_vector_selections_decide_distinct_values_themselves() {
        // Without ties at the boundary the vector versions must not hand over to the plain one
        // (else the test above would only compare the plain version with itself).
        let mut rng = ChaCha8Rng::seed_from_u64(10);
        let mut work = SelectionWork::default();
        let (mut found, mut expected, mut values) = (Vec::new(), Vec::new(), Vec::new());
        for case in 0..200 {
            let n = 17 + case % 112;
            let row: Vec<f32> = (0..n).map(|_| rng.random_range(-30.0f32..0.0)).collect();
            let top = 1 + case % 16;
            select_top_portable(&row, top, 40.0, &mut expected, &mut values);
            #[cfg(target_arch = "x86_64")]
            for level in levels() {
                // SAFETY: `levels` lists only detected levels.
                let decided = unsafe {
                    match level {
                        Level::Avx512 => select_top_avx512(&row, top, 40.0, &mut found, &mut work),
                        Level::Avx2 => select_top_avx2(&row, top, 40.0, &mut found, &mut work),
                        Level::Portable => continue,
                    }
                };
                assert!(decided, "case {case}, {level:?}");
                assert_eq!(found, expected, "case {case}, {level:?}");
                found.clear();
            }
        }
    }

    #[test]
    fn selection_keeps_the_top_within_the_gap_and_lower_indices_on_ties() {
        let mut work = SelectionWork::default();
        let mut found = Vec::new();
        let row = [1.0f32, 5.0, 3.0, 5.0, -50.0, 3.0, 3.0, 4.0];
        for level in levels() {
            select_top(level, &row, 4, 40.0, &mut found, &mut work);
            assert_eq!(
                found,
                vec![(5.0, 1), (3.0, 2), (5.0, 3), (4.0, 7)],
                "{level:?}"
            );
            // −50 is more than 40 below the best: never chosen.
            select_top(level, &row, 8, 40.0, &mut found, &mut work);
            assert_eq!(found.len(), 7, "{level:?}");
            assert!(found.iter().all(|&(_, i)| i != 4));
        }
    }

    #[test]
    fn scores_agree_between_levels() {
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        for dims in [1, 3, 4, 7, 8, 9, 13, 39, 40, 41] {
            let stride = padded(dims);
            let mut weights = vec![0.0f64; 2 * stride];
            for d in 0..dims {
                weights[d] = rng.random_range(-3.0..3.0);
                weights[stride + d] = -rng.random_range(0.05..4.0);
            }
            let x: Vec<f64> = (0..dims).map(|_| rng.random_range(-4.0..4.0)).collect();
            let exact: f64 = -7.5
                + (0..dims)
                    .map(|d| x[d] * (weights[d] + x[d] * weights[stride + d]))
                    .sum::<f64>();
            let magnitude: f64 = 7.5
                + (0..dims)
                    .map(|d| (x[d] * weights[d]).abs() + (x[d] * x[d] * weights[stride + d]).abs())
                    .sum::<f64>();
            let vector = score(Level::detect(), -7.5, &x, &weights);
            for level in levels() {
                let value = score(level, -7.5, &x, &weights);
                // Rounding only: a few units of the last place of the terms' magnitude.
                assert!(
                    (value - exact).abs() <= 1e-14 * magnitude,
                    "{dims} dims, {level:?}: {value} vs {exact}"
                );
                if level != Level::Portable {
                    assert_eq!(value.to_bits(), vector.to_bits(), "{dims}, {level:?}");
                }
            }
        }
    }

    #[test]
    fn axpy_agrees_between_levels() {
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        for n in [0, 1, 3, 4, 5, 8, 9, 39, 40] {
            let x: Vec<f64> = (0..n).map(|_| rng.random_range(-4.0..4.0)).collect();
            let y: Vec<f64> = (0..n).map(|_| rng.random_range(-4.0..4.0)).collect();
            for level in levels() {
                let mut out = y.clone();
                axpy(level, 0.37, &x, &mut out);
                for d in 0..n {
                    let exact = y[d] + 0.37 * x[d];
                    assert!((out[d] - exact).abs() <= 1e-15 * (y[d].abs() + x[d].abs()));
                }
            }
        }
    }
}

//! The bfloat16 products of [`crate::bf16_matmul`] on the tile unit of CPUs with AMX.
//!
//! Intel CPUs from the fourth Xeon generation on have, beside AVX-512 BF16, a matrix unit
//! (AMX): eight tile registers of up to 16 rows × 64 bytes and an instruction (`TDPBF16PS`)
//! that adds the product of a 16 × 32 bfloat16 tile and a 32 × 16 one, pairs of `k` side by
//! side, to a 16 × 16 tile of f32 sums — 8 192 multiply-adds at once. On such a CPU the
//! AVX-512 dot-product instruction of the register kernel runs at about half the rate of f32
//! fused multiply-adds (measured: DEVELOPERS.md, "bf16 products on a CPU with AMX"), so the
//! products go to the tile unit instead. The arithmetic is the one of the register kernel:
//! operands rounded to bfloat16 by [`crate::bf16_matmul`]'s rounding, each pair's two products
//! added to an f32 sum, pairs in `k` order.
//!
//! Blocking. `rhs` is converted once per call into the column panels of the register kernel
//! (32 columns, one 32-bit lane per column and pair of `k`), padded with zero pairs to a
//! multiple of 16 pairs. Each thread takes blocks of at most [`MC`] rows; for each block of
//! [`KC`] pairs of `k` it converts its rows into row-major pairs (a tile row is 16 pairs), then
//! for every 32 columns and 32 rows loads four 16 × 16 tiles of sums from an f32 scratch of
//! the block (zero at the first `k` block), adds the products of two row tiles and two column
//! tiles over the block's pairs, and stores them back. The scratch goes to the destination
//! once, at the end. Sums are exact f32 values between `k` blocks (a tile store and load loses
//! nothing), so every destination element is one chain of f32 additions in `k` order, the same
//! at any thread count.
//!
//! The tile registers are not part of a thread's state until the kernel allows the process to
//! use them: Linux asks programs to request it once (`arch_prctl(ARCH_REQ_XCOMP_PERM,
//! XFEATURE_XTILEDATA)`), and a kernel that refuses leaves the register kernel in use. Each
//! block of work loads the tile configuration and releases the tiles when done.

use std::arch::asm;
use std::arch::x86_64::*;
use std::cell::RefCell;
use std::sync::OnceLock;
use std::thread::LocalKey;

use crate::bf16_matmul::{pack_contiguous, pack_panels, pair, round16, Destination, NR};
use crate::fused::View;

/// Pairs of `k` per block: a 32-row slice of converted rows (32 KiB) and a column panel's
/// slice (32 KiB) per step; a whole block of rows (`MC · KC · 4` bytes = 256 KiB) stays in L2.
const KC: usize = 256;
/// Rows per block at most (a multiple of 32, the rows of one step).
const MC: usize = 256;
/// Rows, pairs and columns of a tile.
const TILE: usize = 16;

/// Whether this process may run the tile kernel: the CPU has AMX-TILE and AMX-BF16 (CPUID leaf
/// 7, EDX bits 24 and 22), the operating system grants the tile data state, and
/// `ISOGLOSS_BF16_KERNEL` does not say `avx512` (a switch for benchmarks and tests that compare
/// the two kernels). Decided once per process.
pub(crate) fn usable() -> bool {
    static USABLE: OnceLock<bool> = OnceLock::new();
    *USABLE.get_or_init(|| {
        if std::env::var("ISOGLOSS_BF16_KERNEL").is_ok_and(|v| v == "avx512") {
            return false;
        }
        // Leaf 0 reports the highest leaf, checked first.
        let has_tiles = __cpuid(0).eax >= 7 && {
            let edx = __cpuid_count(7, 0).edx;
            edx & (1 << 24) != 0 && edx & (1 << 22) != 0
        };
        has_tiles && request_tile_state()
    })
}

/// Asks Linux for the tile data state (`ARCH_REQ_XCOMP_PERM`, feature 18); true when granted.
#[cfg(target_os = "linux")]
fn request_tile_state() -> bool {
    const ARCH_REQ_XCOMP_PERM: libc::c_long = 0x1023;
    const XFEATURE_XTILEDATA: libc::c_long = 18;
    // SAFETY: a plain system call with two integer arguments; it changes only which register
    // state the process may use.
    unsafe {
        libc::syscall(
            libc::SYS_arch_prctl,
            ARCH_REQ_XCOMP_PERM,
            XFEATURE_XTILEDATA,
        ) == 0
    }
}

#[cfg(not(target_os = "linux"))]
fn request_tile_state() -> bool {
    false
}

/// `dst = (accumulate ? dst : 0) + lhs · rhs` on the tile unit, operands rounded to bfloat16.
///
/// # Safety
///
/// [`usable`] returned true; the CPU has AVX-512 F, BW and BF16; `m`, `n`, `k` ≥ 1; every
/// element the three views address lies inside its slice; the destination elements are
/// distinct (row stride ≥ `n` × column stride).
#[allow(clippy::too_many_arguments)]
pub(crate) unsafe fn matmul(
    (m, n, k): (usize, usize, usize),
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    lhs: &[f32],
    lhs_view: View,
    rhs: &[f32],
    rhs_view: View,
) {
    let threads = rayon::current_num_threads().max(1);
    let pairs = k.div_ceil(2);
    let padded_pairs = pairs.div_ceil(TILE) * TILE;
    let panels = n.div_ceil(NR);
    with_buffer(&PACKED_RHS, panels * padded_pairs * NR, |packed_rhs| {
        // SAFETY: the caller's guarantees; the reused buffer holds every panel.
        unsafe { pack_panels(packed_rhs, rhs, rhs_view, (k, n), padded_pairs) };
        // SAFETY: the caller's guarantees.
        unsafe {
            product(
                (m, n, k),
                threads,
                dst,
                dst_view,
                accumulate,
                (lhs, lhs_view),
                packed_rhs,
                padded_pairs,
            )
        }
    })
}

thread_local! {
    /// Each thread's buffers, kept from call to call (a fresh buffer of this size would cost a
    /// page fault per 4 KiB, and unmapping it a TLB shootdown on the other cores).
    static PACKED_RHS: RefCell<Vec<u32>> = const { RefCell::new(Vec::new()) };
    static PACKED_LHS: RefCell<Vec<u32>> = const { RefCell::new(Vec::new()) };
    static SUMS: RefCell<Vec<f32>> = const { RefCell::new(Vec::new()) };
}

/// `f` on the first `len` values of this thread's `buffer` (grown if needed; its old values
/// stay), or of a fresh zeroed one when the thread's is in use (a job of an outer parallel
/// loop run while this thread waits).
fn with_buffer<T: Copy + Default, R>(
    buffer: &'static LocalKey<RefCell<Vec<T>>>,
    len: usize,
    f: impl FnOnce(&mut [T]) -> R,
) -> R {
    buffer.with(|cell| match cell.try_borrow_mut() {
        Ok(mut values) => {
            if values.len() < len {
                values.resize(len, T::default());
            }
            f(&mut values[..len])
        }
        Err(_) => f(&mut vec![T::default(); len]),
    })
}

/// The product over converted column panels, in row blocks spread over the threads.
///
/// # Safety
///
/// As [`matmul`]; `packed_rhs` holds the panels of `rhs`, `padded_pairs` pairs each.
#[allow(clippy::too_many_arguments)]
pub(crate) unsafe fn product(
    (m, n, k): (usize, usize, usize),
    threads: usize,
    dst: &mut [f32],
    dst_view: View,
    accumulate: bool,
    (lhs, lhs_view): (&[f32], View),
    packed_rhs: &[u32],
    padded_pairs: usize,
) {
    use rayon::prelude::*;
    let mc = MC.min(m.div_ceil(threads).div_ceil(2 * TILE) * 2 * TILE);
    let blocks = m.div_ceil(mc);
    let job = Job {
        n,
        k,
        accumulate,
        lhs,
        lhs_view,
        packed_rhs,
        padded_pairs,
        out: Destination {
            base: dst.as_mut_ptr(),
            view: dst_view,
        },
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

/// What every row block of one product shares.
struct Job<'a> {
    n: usize,
    k: usize,
    accumulate: bool,
    lhs: &'a [f32],
    lhs_view: View,
    /// Column panels of `padded_pairs · NR` values.
    packed_rhs: &'a [u32],
    padded_pairs: usize,
    out: Destination,
}

/// The tile configuration (palette 1): tiles 0–3 hold 16 × 16 f32 sums, 4–5 rows of the left
/// operand (16 rows × 16 pairs), 6–7 pairs of the right one (16 pairs × 16 columns); every
/// tile is 16 rows of 64 bytes.
#[repr(C, align(64))]
struct TileConfig([u8; 64]);

impl TileConfig {
    fn new() -> TileConfig {
        let mut bytes = [0u8; 64];
        bytes[0] = 1;
        for tile in 0..8 {
            bytes[16 + 2 * tile] = 64;
            bytes[48 + tile] = TILE as u8;
        }
        TileConfig(bytes)
    }
}

impl Job<'_> {
    /// Rows `first .. first + rows` of the destination.
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    unsafe fn rows(&self, first: usize, rows: usize) {
        let padded_rows = rows.div_ceil(2 * TILE) * 2 * TILE;
        let padded_columns = self.n.div_ceil(NR) * NR;
        let kc = KC.min(self.padded_pairs);
        // Converted rows of one `k` block, row-major: row r, pair q at r · kc + q.
        with_buffer(&PACKED_LHS, padded_rows * kc, |packed_lhs| {
            // The f32 sums of the block, row-major over the padded columns (every value is
            // written by a tile store before it is read).
            with_buffer(&SUMS, padded_rows * padded_columns, |sums| {
                // SAFETY: the caller's guarantees.
                unsafe { self.block(first, rows, kc, packed_lhs, sums) }
            })
        })
    }

    /// [`Job::rows`] with its buffers.
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    unsafe fn block(
        &self,
        first: usize,
        rows: usize,
        kc: usize,
        packed_lhs: &mut [u32],
        sums: &mut [f32],
    ) {
        let pairs = self.k.div_ceil(2);
        let padded_rows = rows.div_ceil(2 * TILE) * 2 * TILE;
        let padded_columns = self.n.div_ceil(NR) * NR;
        let config = TileConfig::new();
        // SAFETY: the CPU has AMX and the process may use it (the caller's guarantee); the
        // configuration is 64 readable bytes.
        unsafe { asm!("ldtilecfg [{0}]", in(reg) config.0.as_ptr(), options(nostack)) };
        let mut p0 = 0;
        while p0 < pairs {
            let count = kc.min(pairs - p0);
            let steps = count.div_ceil(TILE);
            // Zero what the tiles read and packing does not write: the pairs after `count`
            // up to the last tile's, and the padding rows.
            for r in 0..padded_rows {
                let from = if r < rows { count } else { 0 };
                packed_lhs[r * kc + from..r * kc + steps * TILE].fill(0);
            }
            // SAFETY: the caller's guarantees; `packed_lhs` holds `rows` rows of `kc` pairs.
            unsafe { self.pack_lhs(packed_lhs, kc, first, rows, (p0, count)) };
            for g in 0..padded_rows / (2 * TILE) {
                let r0 = g * 2 * TILE;
                for cp in 0..padded_columns / NR {
                    let panel = &self.packed_rhs[cp * self.padded_pairs * NR..];
                    let c = sums[r0 * padded_columns + cp * NR..].as_mut_ptr();
                    let c_stride = padded_columns * 4;
                    let a = packed_lhs[r0 * kc..].as_ptr();
                    let b = panel[p0 * NR..].as_ptr();
                    // SAFETY: the tiles read and written lie inside `sums` (32 rows × 32
                    // columns from (r0, 32·cp)), `packed_lhs` (32 rows × 16·steps ≤ kc pairs)
                    // and the panel (16·steps pairs from p0, within the padded pairs).
                    unsafe { tile_step(c, c_stride, a, kc * 4, b, steps, p0 == 0) };
                }
            }
            p0 += count;
        }
        // SAFETY: releases the tile state loaded above.
        unsafe { asm!("tilerelease", options(nostack)) };
        self.write(sums, padded_columns, first, rows);
    }

    /// Rows `first .. first + rows` and pairs `p0 .. p0 + count` of `lhs` into `packed`, row
    /// `r` at `r · stride` (missing members of a last odd pair are zero; the rest of `packed`
    /// is left as it is).
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    unsafe fn pack_lhs(
        &self,
        packed: &mut [u32],
        stride: usize,
        first: usize,
        rows: usize,
        (p0, count): (usize, usize),
    ) {
        let (view, k, lhs) = (self.lhs_view, self.k, self.lhs);
        let at = |r: usize, c: usize| view.offset + r * view.row_stride + c * view.col_stride;
        if view.col_stride == 1 {
            for r in 0..rows {
                let row = &lhs[at(first + r, 0)..];
                let out = &mut packed[r * stride..];
                pack_contiguous(row, k, (p0, count), |q, v| out[q] = v);
            }
        } else if view.row_stride == 1 {
            // Rows side by side in memory: sixteen rows of one pair per vector, then written
            // out row by row.
            let mut block = [[0u32; TILE]; TILE];
            for r0 in (0..rows).step_by(TILE) {
                let live = TILE.min(rows - r0);
                let mask = crate::bf16_matmul::lanes(live);
                for q0 in (0..count).step_by(TILE) {
                    let width = TILE.min(count - q0);
                    for (q, slot) in block.iter_mut().enumerate().take(width) {
                        let c = 2 * (p0 + q0 + q);
                        // SAFETY: the lanes read are rows first + r0 .. + live of columns c
                        // and c + 1, inside the slice by the caller's guarantee.
                        let low = unsafe {
                            _mm512_maskz_loadu_ps(mask, lhs.as_ptr().add(at(first + r0, c)))
                        };
                        let high = if c + 1 < k {
                            unsafe {
                                _mm512_maskz_loadu_ps(mask, lhs.as_ptr().add(at(first + r0, c + 1)))
                            }
                        } else {
                            _mm512_setzero_ps()
                        };
                        let value =
                            _mm512_or_si512(round16(low), _mm512_slli_epi32::<16>(round16(high)));
                        // SAFETY: `slot` holds 16 lanes.
                        unsafe { _mm512_storeu_si512(slot.as_mut_ptr().cast(), value) };
                    }
                    for i in 0..live {
                        let out = &mut packed[(r0 + i) * stride + q0..][..width];
                        for (q, value) in out.iter_mut().enumerate() {
                            *value = block[q][i];
                        }
                    }
                }
            }
        } else {
            for r in 0..rows {
                for q in 0..count {
                    let c = 2 * (p0 + q);
                    let high = if c + 1 < k {
                        lhs[at(first + r, c + 1)]
                    } else {
                        0.0
                    };
                    packed[r * stride + q] = pair(lhs[at(first + r, c)], high);
                }
            }
        }
    }

    /// The block's sums into rows `first .. first + rows` of the destination (added to it when
    /// accumulating).
    fn write(&self, sums: &[f32], stride: usize, first: usize, rows: usize) {
        let view = self.out.view;
        for r in 0..rows {
            let row = &sums[r * stride..][..self.n];
            for (j, &value) in row.iter().enumerate() {
                let index = view.offset + (first + r) * view.row_stride + j * view.col_stride;
                // SAFETY: inside the destination (the caller's guarantee); this block owns the
                // row.
                unsafe {
                    let at = self.out.base.add(index);
                    *at = if self.accumulate { *at + value } else { value };
                }
            }
        }
    }
}

/// One step of 32 rows × 32 columns over `steps` groups of 16 pairs: tiles 0–3 take the sums at
/// `c` (or zero when `fresh`), gain `A · B`, and go back to `c`.
///
/// # Safety
///
/// The tile configuration of [`TileConfig::new`] is loaded; `c` addresses 32 rows of 32 f32
/// (row stride `c_stride` bytes), `a` 32 rows of `16 · steps` pairs (`a_stride` bytes), `b`
/// `16 · steps` pair rows of 32 columns (row stride `NR · 4` bytes).
#[inline]
unsafe fn tile_step(
    c: *mut f32,
    c_stride: usize,
    a: *const u32,
    a_stride: usize,
    b: *const u32,
    steps: usize,
    fresh: bool,
) {
    let b_stride = NR * 4;
    let c_down = c_stride / 4 * TILE;
    let a_down = a_stride / 4 * TILE;
    // SAFETY (every block): the addresses are inside the buffers (the caller's guarantee).
    unsafe {
        if fresh {
            asm!(
                "tilezero tmm0",
                "tilezero tmm1",
                "tilezero tmm2",
                "tilezero tmm3",
                options(nostack)
            );
        } else {
            asm!(
                "tileloadd tmm0, [{c0} + {s}*1]",
                "tileloadd tmm1, [{c1} + {s}*1]",
                "tileloadd tmm2, [{c2} + {s}*1]",
                "tileloadd tmm3, [{c3} + {s}*1]",
                c0 = in(reg) c,
                c1 = in(reg) c.add(TILE),
                c2 = in(reg) c.add(c_down),
                c3 = in(reg) c.add(c_down + TILE),
                s = in(reg) c_stride,
                options(nostack, readonly)
            );
        }
        for step in 0..steps {
            let a0 = a.add(step * TILE);
            let b0 = b.add(step * TILE * NR);
            asm!(
                "tileloadd tmm4, [{a0} + {sa}*1]",
                "tileloadd tmm6, [{b0} + {sb}*1]",
                "tileloadd tmm7, [{b1} + {sb}*1]",
                "tdpbf16ps tmm0, tmm4, tmm6",
                "tileloadd tmm5, [{a1} + {sa}*1]",
                "tdpbf16ps tmm1, tmm4, tmm7",
                "tdpbf16ps tmm2, tmm5, tmm6",
                "tdpbf16ps tmm3, tmm5, tmm7",
                a0 = in(reg) a0,
                a1 = in(reg) a0.add(a_down),
                b0 = in(reg) b0,
                b1 = in(reg) b0.add(TILE),
                sa = in(reg) a_stride,
                sb = in(reg) b_stride,
                options(nostack, readonly)
            );
        }
        asm!(
            "tilestored [{c0} + {s}*1], tmm0",
            "tilestored [{c1} + {s}*1], tmm1",
            "tilestored [{c2} + {s}*1], tmm2",
            "tilestored [{c3} + {s}*1], tmm3",
            c0 = in(reg) c,
            c1 = in(reg) c.add(TILE),
            c2 = in(reg) c.add(c_down),
            c3 = in(reg) c.add(c_down + TILE),
            s = in(reg) c_stride,
            options(nostack)
        );
    }
}

//! Products a·B with a fixed right-hand matrix B and few rows of a, in f32: the two products of
//! every i-vector solve (N·Q and F̃·Σ⁻¹T, see [`crate::total_variability`]).
//!
//! A general matrix product copies ("packs") both operands into a cache-friendly layout on
//! every call; with the few rows a recomputation chunk or an utterance has, packing B (up to
//! megabytes) costs more than the arithmetic. Here B is arranged once, when the model is built,
//! into column panels of [`WIDTH`] columns stored row after row, so that a product streams each
//! panel once per group of [`GROUP`] rows of a and keeps the sums in registers. Where the
//! processor has AVX2 and FMA (checked at run time; the portable build may only assume SSE2) the
//! inner loop is written with their intrinsics, with several independent sums per row so that
//! the fused multiply-adds do not wait on each other; elsewhere a plain loop does the same sums.

/// Columns per panel: one 8-lane AVX register of f32.
pub(crate) const WIDTH: usize = 8;
/// Rows of a multiplied together (each pass over B serves this many rows; B of the F̃·Σ⁻¹T
/// product is 800 kB at the default sizes, more than a core's share of cache).
const GROUP: usize = 6;
/// Partial sums per row and column (over k mod SPLIT), the same for every group size, so that
/// a row's result does not depend on which rows it was multiplied with (an online stream fed
/// in pieces of any size gives the same vectors).
const SPLIT: usize = 2;

/// A fixed `[rows, columns]` matrix in column panels for [`PanelMatrix::left_multiply`].
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct PanelMatrix {
    rows: usize,
    columns: usize,
    /// Rows of B per block for skipping: a block whose entries of a are all zero (in every
    /// row of a group) is left out of the sums, which leaves them unchanged.
    block: usize,
    /// Panel p holds columns p·WIDTH.. (zero-padded to WIDTH), row after row:
    /// `values[(p·rows + k)·WIDTH + j]` = B[k, p·WIDTH + j].
    values: Vec<f32>,
}

impl PanelMatrix {
    /// B from a function of (row, column), rounded to f32; `block` rows of B (at least 1) are
    /// skipped together where a is zero on all of them (a Gaussian's rows: a Gaussian no frame
    /// of a window falls on has zero statistics).
    pub(crate) fn from_fn(
        rows: usize,
        columns: usize,
        block: usize,
        b: impl Fn(usize, usize) -> f64,
    ) -> Self {
        let panels = columns.div_ceil(WIDTH);
        let mut values = vec![0.0f32; panels * rows * WIDTH];
        for p in 0..panels {
            for k in 0..rows {
                for j in 0..WIDTH.min(columns - p * WIDTH) {
                    values[(p * rows + k) * WIDTH + j] = b(k, p * WIDTH + j) as f32;
                }
            }
        }
        PanelMatrix {
            rows,
            columns,
            block: block.max(1),
            values,
        }
    }

    /// a·B for `a` of `a.len() / rows` rows (row-major, each of B's row count), row-major
    /// `[a rows, columns]`. Sums are in f32.
    pub(crate) fn left_multiply(&self, a: &[f32]) -> Vec<f32> {
        let items = a.len().checked_div(self.rows).unwrap_or(0);
        let mut out = vec![0.0f32; items * self.columns];
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
            {
                // SAFETY: the CPU supports AVX2 and FMA, checked just above.
                unsafe { left_multiply_avx2(self, a, &mut out) };
                return out;
            }
        }
        left_multiply_portable(self, a, &mut out);
        out
    }
}

/// Rows of `a` (each `b.rows` long) paired with their output rows (each `b.columns` long).
fn row_pairs<'a, 'o>(
    b: &PanelMatrix,
    a: &'a [f32],
    out: &'o mut [f32],
) -> impl Iterator<Item = (&'a [f32], &'o mut [f32])> {
    a.chunks_exact(b.rows.max(1))
        .zip(out.chunks_exact_mut(b.columns.max(1)))
}

/// The product row by row, in plain Rust (one sum per output value).
fn left_multiply_portable(b: &PanelMatrix, a: &[f32], out: &mut [f32]) {
    if b.rows == 0 || b.columns == 0 {
        return;
    }
    let pairs: Vec<(&[f32], &mut [f32])> = row_pairs(b, a, out).collect();
    for (a_row, out_row) in pairs {
        for (p, panel) in b.values.chunks_exact(b.rows * WIDTH).enumerate() {
            let mut sums = [0.0f32; WIDTH];
            for (&weight, b_row) in a_row.iter().zip(panel.chunks_exact(WIDTH)) {
                if weight == 0.0 {
                    continue;
                }
                for j in 0..WIDTH {
                    sums[j] += weight * b_row[j];
                }
            }
            let start = p * WIDTH;
            let width = WIDTH.min(b.columns - start);
            out_row[start..start + width].copy_from_slice(&sums[..width]);
        }
    }
}

/// The product with AVX2 + FMA: GROUP rows of a at a time against each panel, with SPLIT
/// independent sums per row (twelve chains of fused multiply-adds in flight, fourteen of the
/// sixteen vector registers with the row of B and the broadcast weight), then the remaining
/// rows together.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn left_multiply_avx2(b: &PanelMatrix, a: &[f32], out: &mut [f32]) {
    if b.rows == 0 || b.columns == 0 {
        return;
    }
    let mut pairs: Vec<(&[f32], &mut [f32])> = row_pairs(b, a, out).collect();
    let mut ranges: Vec<(usize, usize)> = Vec::new();
    for group in pairs.chunks_mut(GROUP) {
        // The runs of blocks where some row of the group is non-zero.
        ranges.clear();
        for start in (0..b.rows).step_by(b.block) {
            let end = (start + b.block).min(b.rows);
            if group
                .iter()
                .any(|(row, _)| row[start..end].iter().any(|&v| v != 0.0))
            {
                match ranges.last_mut() {
                    Some(last) if last.1 == start => last.1 = end,
                    _ => ranges.push((start, end)),
                }
            }
        }
        for (p, panel) in b.values.chunks_exact(b.rows * WIDTH).enumerate() {
            macro_rules! rows {
                ($m:literal) => {{
                    let a: [&[f32]; $m] = std::array::from_fn(|i| group[i].0);
                    // SAFETY: AVX2 and FMA are enabled for this function; the panel holds
                    // b.rows rows of WIDTH values and every row of a has b.rows values.
                    let sums = unsafe { panel_sums_avx2::<$m>(panel, b.rows, &ranges, a) };
                    for (sum, (_, out_row)) in sums.iter().zip(group.iter_mut()) {
                        store(sum, p, b.columns, out_row);
                    }
                }};
            }
            match group.len() {
                1 => rows!(1),
                2 => rows!(2),
                3 => rows!(3),
                4 => rows!(4),
                5 => rows!(5),
                _ => rows!(6),
            }
        }
    }
}

/// Writes panel `p`'s WIDTH sums (the real columns of them) into an output row.
fn store(sums: &[f32; WIDTH], p: usize, columns: usize, out_row: &mut [f32]) {
    let start = p * WIDTH;
    let width = WIDTH.min(columns - start);
    out_row[start..start + width].copy_from_slice(&sums[..width]);
}

/// Σ_k a_i[k]·panel[k] over the k of `ranges` (sorted, disjoint, within `rows`) for M rows
/// a_i, each sum split into SPLIT partial sums by k mod SPLIT, so that the order of the
/// arithmetic of one row depends neither on M nor on which zero blocks are skipped.
///
/// # Safety
/// The caller must have AVX2 and FMA; `panel` must hold `rows · WIDTH` values and every a_i at
/// least `rows`.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn panel_sums_avx2<const M: usize>(
    panel: &[f32],
    rows: usize,
    ranges: &[(usize, usize)],
    a: [&[f32]; M],
) -> [[f32; WIDTH]; M] {
    use std::arch::x86_64::*;
    assert!(
        panel.len() >= rows * WIDTH
            && a.iter().all(|row| row.len() >= rows)
            && ranges
                .iter()
                .all(|&(start, end)| start <= end && end <= rows)
    );
    let b = panel.as_ptr();
    let mut sums = [[_mm256_setzero_ps(); SPLIT]; M];
    // One k into partial sum U (= k mod SPLIT).
    macro_rules! step {
        ($k:expr, $u:tt) => {{
            // SAFETY: k < rows (asserted above), so both reads are in bounds.
            let b_row = unsafe { _mm256_loadu_ps(b.add($k * WIDTH)) };
            for i in 0..M {
                let weight = _mm256_set1_ps(unsafe { *a[i].get_unchecked($k) });
                sums[i][$u] = _mm256_fmadd_ps(weight, b_row, sums[i][$u]);
            }
        }};
    }
    macro_rules! single {
        ($k:expr) => {{
            match $k % SPLIT {
                0 => step!($k, 0),
                _ => step!($k, 1),
            }
        }};
    }
    for &(start, end) in ranges {
        let mut k = start;
        while k < end && k % SPLIT != 0 {
            single!(k);
            k += 1;
        }
        while k + SPLIT <= end {
            step!(k, 0);
            step!(k + 1, 1);
            k += SPLIT;
        }
        while k < end {
            single!(k);
            k += 1;
        }
    }
    let mut out = [[0.0f32; WIDTH]; M];
    for i in 0..M {
        let total = _mm256_add_ps(sums[i][0], sums[i][1]);
        // SAFETY: out[i] holds WIDTH = 8 values.
        unsafe { _mm256_storeu_ps(out[i].as_mut_ptr(), total) };
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_rows_product_does_not_depend_on_the_rows_beside_it() {
        // Values that round differently in different summation orders.
        let (rows, columns) = (4992, 40);
        let matrix =
            PanelMatrix::from_fn(rows, columns, 39, |k, j| ((k * 31 + j * 17) as f64).sin());
        // Rows with runs of zeros (Gaussians without statistics), different in each row, so
        // that groups skip different blocks than single rows.
        let a: Vec<f32> = (0..7 * rows)
            .map(|i| {
                let (row, k) = (i / rows, i % rows);
                if (k / 39 + row) % 3 == 0 || k / 39 == 5 {
                    0.0
                } else {
                    ((i * 13) as f32 * 0.37).cos() * 100.0
                }
            })
            .collect();
        let together = matrix.left_multiply(&a);
        for i in 0..7 {
            let alone = matrix.left_multiply(&a[i * rows..(i + 1) * rows]);
            assert_eq!(alone, together[i * columns..(i + 1) * columns], "row {i}");
            let pair_start = i.min(5);
            let pair = matrix.left_multiply(&a[pair_start * rows..(pair_start + 2) * rows]);
            let at = (i - pair_start) * columns;
            assert_eq!(
                pair[at..at + columns],
                together[i * columns..(i + 1) * columns]
            );
        }
    }

    #[test]
    fn products_equal_the_definition_for_every_row_count_and_padding() {
        for (rows, columns) in [(1, 1), (5, 8), (7, 13), (33, 20)] {
            let b = |k: usize, j: usize| ((k * 7 + j * 3) % 11) as f64 / 4.0 - 1.0;
            let matrix = PanelMatrix::from_fn(rows, columns, 3, b);
            for items in [0, 1, 3, 4, 5, 9] {
                let a: Vec<f32> = (0..items * rows)
                    .map(|i| ((i * 5) % 9) as f32 / 2.0 - 2.0)
                    .collect();
                let product = matrix.left_multiply(&a);
                assert_eq!(product.len(), items * columns);
                for i in 0..items {
                    for j in 0..columns {
                        // Small integers over powers of two: exact in f32 in any order.
                        let expected: f64 = (0..rows)
                            .map(|k| f64::from(a[i * rows + k]) * b(k, j))
                            .sum();
                        assert_eq!(f64::from(product[i * columns + j]), expected, "{i}, {j}");
                    }
                }
                let mut portable = vec![0.0; items * columns];
                left_multiply_portable(&matrix, &a, &mut portable);
                assert_eq!(portable, product);
            }
        }
    }
}

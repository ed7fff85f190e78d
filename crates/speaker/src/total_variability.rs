//! The total-variability model: the posterior of the latent factor w given Baum–Welch
//! statistics (the i-vector is its mean), and EM training of T.
//!
//! Model (Dehak et al. 2011): the mean supervector of an item is M = m + T·w with m the UBM's
//! means, T of shape CD×R, w ~ N(0, I). With the frame alignments γ of the UBM held fixed and
//! the UBM's covariances Σ, the statistics N_c, F̃_c = Σ_t γ_t(c)(x_t − μ_c) of an item give
//! (Kenny, Boulianne and Dumouchel 2005, "Eigenvoice modeling with sparse training data"):
//!
//! ```text
//! precision  L = I + Σ_c N_c · T_cᵀ Σ_c⁻¹ T_c         (R×R)
//! linear     b = Σ_c T_cᵀ Σ_c⁻¹ F̃_c                    (R)
//! posterior  w | stats ~ N(L⁻¹b, L⁻¹)                  i-vector = L⁻¹b
//! ```
//!
//! and the EM re-estimation of T from items s (Kenny et al. 2005; the same update in Dehak et
//! al. 2011, section III):
//!
//! ```text
//! E[w_s] = L_s⁻¹ b_s,   E[w_s w_sᵀ] = L_s⁻¹ + E[w_s] E[w_s]ᵀ
//! A_c = Σ_s N_c(s) E[w_s w_sᵀ],   C = Σ_s F̃(s) E[w_s]ᵀ    (CD×R)
//! T_c ← C_c A_c⁻¹
//! ```
//!
//! optionally followed by the minimum-divergence step (Kenny's re-estimation of the prior,
//! folded into T; from memory of Kenny's 2005 technical report on joint factor analysis):
//! G = (1/S) Σ_s E[w_s w_sᵀ] = LLᵀ, T ← T·L, so that the factors the data imply are again
//! distributed as N(0, I).
//!
//! EM maximises the log-likelihood of the statistics with the alignments fixed; the part that
//! depends on T is, summed over items, Σ_s ½ b_sᵀ L_s⁻¹ b_s − ½ log det L_s (w integrated out of
//! Π_t N(x_t; μ_c + T_c w, Σ_c)^γ_t(c) against its N(0, I) prior). [`TotalVariability::em_iteration`]
//! reports it, and it never decreases from one iteration to the next.

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::linalg::{
    cholesky, cholesky_inverse, cholesky_log_determinant, cholesky_solve, pack_lower, packed_len,
    solve_positive_definite_in_place, unpack_symmetric,
};
use crate::panels::PanelMatrix;
use crate::ubm::DiagGmm;
use crate::SpeakerError;

/// Items per parallel chunk of the posterior computation.
const ITEMS_PER_CHUNK: usize = 32;

/// The total-variability matrix T with the products of it that every posterior needs.
#[derive(Debug, Clone, PartialEq)]
pub struct TotalVariability {
    /// T, `[C·D, R]`; row c·D + d belongs to Gaussian c, dimension d.
    matrix: Array2<f64>,
    /// Σ⁻¹T, `[C·D, R]`.
    scaled: Array2<f64>,
    /// `[C, R(R+1)/2]`: the lower triangles of T_cᵀ Σ_c⁻¹ T_c, row by row.
    quadratic: Array2<f64>,
    /// `quadratic` and `scaled` rounded to f32 and arranged for
    /// [`TotalVariability::posterior_means_single`].
    quadratic_panels: PanelMatrix,
    scaled_panels: PanelMatrix,
    gaussians: usize,
    dims: usize,
}

/// The posterior of the latent factor of one item.
#[derive(Debug, Clone, PartialEq)]
pub struct FactorPosterior {
    /// E[w] = L⁻¹b: the i-vector before post-processing.
    pub mean: Array1<f64>,
    /// Cov[w] = L⁻¹.
    pub covariance: Array2<f64>,
    /// ½ bᵀL⁻¹b − ½ log det L: the item's log-likelihood terms that depend on T.
    pub log_likelihood: f64,
}

impl TotalVariability {
    /// T for `ubm` from a `[C·D, R]` matrix.
    pub fn new(matrix: Array2<f64>, ubm: &DiagGmm) -> Result<TotalVariability, SpeakerError> {
        let (gaussians, dims) = (ubm.gaussians(), ubm.dims());
        if matrix.nrows() != gaussians * dims || matrix.ncols() == 0 {
            return Err(SpeakerError::InvalidModel {
                problem: format!(
                    "total-variability matrix of shape {:?}, expected [{} (Gaussians × dims), rank ≥ 1]",
                    matrix.shape(),
                    gaussians * dims
                ),
            });
        }
        if let Some(((row, column), v)) = matrix.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(SpeakerError::InvalidModel {
                problem: format!("total-variability matrix entry [{row}, {column}] is {v}"),
            });
        }
        let rank = matrix.ncols();
        let precisions = ubm.variances().mapv(|v| 1.0 / v);
        let mut scaled = matrix.clone();
        for (index, mut row) in scaled.rows_mut().into_iter().enumerate() {
            row *= precisions[(index / dims, index % dims)];
        }
        let mut quadratic = Array2::<f64>::zeros((gaussians, packed_len(rank)));
        for c in 0..gaussians {
            let block = matrix.slice(s![c * dims..(c + 1) * dims, ..]);
            let scaled_block = scaled.slice(s![c * dims..(c + 1) * dims, ..]);
            let product = block.t().dot(&scaled_block);
            pack_lower(product.view(), quadratic.row_mut(c));
        }
        let quadratic_panels =
            PanelMatrix::from_fn(gaussians, quadratic.ncols(), 1, |c, k| quadratic[(c, k)]);
        let scaled_panels = PanelMatrix::from_fn(scaled.nrows(), rank, dims, |k, r| scaled[(k, r)]);
        Ok(TotalVariability {
            matrix,
            scaled,
            quadratic,
            quadratic_panels,
            scaled_panels,
            gaussians,
            dims,
        })
    }

    /// A random starting T: entry (c·D + d, r) = σ_cd · z / (2√R) with z standard normal (seeded),
    /// so that T·w for w ~ N(0, I) moves each mean by about half a UBM standard deviation. The
    /// scale only sets where EM starts; the minimum-divergence step rescales T anyway.
    pub fn random(ubm: &DiagGmm, rank: usize, seed: u64) -> Result<TotalVariability, SpeakerError> {
        let (gaussians, dims) = (ubm.gaussians(), ubm.dims());
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let scale = 0.5 / (rank as f64).sqrt();
        let matrix = Array2::from_shape_fn((gaussians * dims, rank), |(index, _)| {
            // Box–Muller: a standard normal draw from two uniforms.
            let u: f64 = rng.random_range(f64::MIN_POSITIVE..1.0);
            let v: f64 = rng.random_range(0.0..1.0);
            let z = (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos();
            ubm.variances()[(index / dims, index % dims)].sqrt() * z * scale
        });
        TotalVariability::new(matrix, ubm)
    }

    /// T, `[C·D, R]`.
    pub fn matrix(&self) -> &Array2<f64> {
        &self.matrix
    }

    /// The rank R of T: the i-vector dimension.
    pub fn rank(&self) -> usize {
        self.matrix.ncols()
    }

    /// Posterior of w for each item, from occupancies `[items, C]` and centred first-order
    /// statistics `[items, C·D]` (row i of F̃ flattened Gaussian by Gaussian).
    pub fn posteriors(
        &self,
        occupancy: ArrayView2<f64>,
        centred: ArrayView2<f64>,
    ) -> Vec<FactorPosterior> {
        self.posteriors_with(occupancy, centred, true)
    }

    /// Posterior means only (the i-vectors), `[items, R]`.
    pub fn posterior_means(
        &self,
        occupancy: ArrayView2<f64>,
        centred: ArrayView2<f64>,
    ) -> Array2<f64> {
        let posteriors = self.posteriors_with(occupancy, centred, false);
        let mut means = Array2::<f64>::zeros((posteriors.len(), self.rank()));
        for (mut row, posterior) in means.rows_mut().into_iter().zip(&posteriors) {
            row.assign(&posterior.mean);
        }
        means
    }

    /// Posterior means like [`TotalVariability::posterior_means`], with the two products
    /// (N·Q and F̃·Σ⁻¹T) in single precision: the statistics come in f32 (occupancies
    /// `[items, C]`, centred first-order statistics `[items, C·D]`), the model's products are
    /// rounded to f32 and the sums are in f32; L = I + N·Q and the solve L⁻¹b are in f64. What
    /// extraction uses (see [`crate::panels`] for why it is cheaper); training and
    /// [`TotalVariability::posteriors`] stay in f64. On statistics of the default sizes (128
    /// Gaussians, 39 dims, R = 40) the means differ from the f64 ones by at most 3.6·10⁻⁷ of
    /// their norm (the test `single_precision_means_stay_close_to_the_f64_ones` holds it below
    /// 10⁻⁵).
    pub fn posterior_means_single(
        &self,
        occupancy: ArrayView2<f32>,
        centred: ArrayView2<f32>,
    ) -> Array2<f64> {
        let items = occupancy.nrows().min(centred.nrows());
        let rank = self.rank();
        let (occupancy, centred) = (occupancy.as_standard_layout(), centred.as_standard_layout());
        let chunks: Vec<Vec<f64>> = (0..items)
            .step_by(ITEMS_PER_CHUNK)
            .collect::<Vec<_>>()
            .into_par_iter()
            .map(|start| {
                let end = (start + ITEMS_PER_CHUNK).min(items);
                let precisions = self
                    .quadratic_panels
                    .left_multiply(&rows(&occupancy, start, end));
                let linear = self
                    .scaled_panels
                    .left_multiply(&rows(&centred, start, end));
                solve_means(&precisions, &linear, rank)
            })
            .collect();
        Array2::from_shape_vec((items, rank), chunks.concat())
            .unwrap_or_else(|_| Array2::zeros((items, rank)))
    }

    fn posteriors_with(
        &self,
        occupancy: ArrayView2<f64>,
        centred: ArrayView2<f64>,
        with_covariance: bool,
    ) -> Vec<FactorPosterior> {
        let items = occupancy.nrows();
        let rank = self.rank();
        (0..items)
            .step_by(ITEMS_PER_CHUNK)
            .collect::<Vec<_>>()
            .into_par_iter()
            .flat_map_iter(|start| {
                let end = (start + ITEMS_PER_CHUNK).min(items);
                // Two products for the whole chunk: N·Q gives the packed data part of every
                // precision, F̃·Σ⁻¹T every linear term.
                let precisions =
                    product(occupancy.slice(s![start..end, ..]), self.quadratic.view());
                let linear = product(centred.slice(s![start..end, ..]), self.scaled.view());
                (0..end - start)
                    .map(|i| {
                        let mut precision = unpack_symmetric(precisions.row(i), rank);
                        precision.diag_mut().iter_mut().for_each(|v| *v += 1.0);
                        posterior_from(precision, linear.row(i), with_covariance)
                    })
                    .collect::<Vec<_>>()
            })
            .collect()
    }

    /// Log-likelihood terms of the statistics that depend on T, summed over items.
    pub fn log_likelihood(&self, occupancy: ArrayView2<f64>, centred: ArrayView2<f64>) -> f64 {
        self.posteriors_with(occupancy, centred, false)
            .iter()
            .map(|p| p.log_likelihood)
            .sum()
    }

    /// One EM iteration (see the module doc) on the statistics of the training items; returns
    /// the new T and the log-likelihood (T-dependent part, summed over items) under *this* T.
    pub fn em_iteration(
        &self,
        ubm: &DiagGmm,
        occupancy: ArrayView2<f64>,
        centred: ArrayView2<f64>,
        minimum_divergence: bool,
    ) -> Result<(TotalVariability, f64), SpeakerError> {
        let posteriors = self.posteriors(occupancy, centred);
        let items = posteriors.len();
        let rank = self.rank();
        let log_likelihood: f64 = posteriors.iter().map(|p| p.log_likelihood).sum();
        let mut means = Array2::<f64>::zeros((items, rank));
        let mut second_moments = Array2::<f64>::zeros((items, packed_len(rank)));
        for (i, posterior) in posteriors.iter().enumerate() {
            means.row_mut(i).assign(&posterior.mean);
            let moment =
                &posterior.covariance + &outer(posterior.mean.view(), posterior.mean.view());
            pack_lower(moment.view(), second_moments.row_mut(i));
        }
        let weighted_moments = occupancy.t().dot(&second_moments); // [C, R(R+1)/2]
        let cross = centred.t().dot(&means); // [C·D, R]
        let dims = self.dims;
        let mut matrix = self.matrix.clone();
        for c in 0..self.gaussians {
            let a = unpack_symmetric(weighted_moments.row(c), rank);
            // A Gaussian that (almost) no frame falls on leaves A_c singular: keep its block.
            let Some(factor) = cholesky(a.view()) else {
                continue;
            };
            for d in 0..dims {
                let row = c * dims + d;
                let solved = cholesky_solve(factor.view(), cross.row(row));
                matrix.row_mut(row).assign(&solved);
            }
        }
        if minimum_divergence && items > 0 {
            let average = unpack_symmetric(
                (second_moments.sum_axis(Axis(0)) / items as f64).view(),
                rank,
            );
            if let Some(factor) = cholesky(average.view()) {
                matrix = matrix.dot(&factor);
            }
        }
        Ok((TotalVariability::new(matrix, ubm)?, log_likelihood))
    }
}

/// Fewer rows than this are multiplied without packing (see [`product`]).
const MIN_ROWS_FOR_PACKING: usize = 2;

/// a·b. A general matrix product first copies ("packs") b into a cache-friendly layout, which
/// for a few rows of a costs more than the product itself (b is Q or Σ⁻¹T, up to megabytes):
/// then b is read once, row by row, and each of its rows is added, scaled, to every output row
/// (the few output rows stay in cache).
fn product(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    if a.nrows() >= MIN_ROWS_FOR_PACKING {
        return a.dot(&b);
    }
    let mut out = Array2::<f64>::zeros((a.nrows(), b.ncols()));
    for (b_row, a_column) in b.rows().into_iter().zip(a.columns()) {
        for (mut out_row, &weight) in out.rows_mut().into_iter().zip(a_column.iter()) {
            if weight != 0.0 {
                out_row.scaled_add(weight, &b_row);
            }
        }
    }
    out
}

/// Rows `start..end` of a matrix as one slice (borrowed when the matrix is contiguous).
fn rows<'a>(
    m: &'a ndarray::CowArray<f32, ndarray::Ix2>,
    start: usize,
    end: usize,
) -> std::borrow::Cow<'a, [f32]> {
    let width = m.ncols();
    match m.as_slice() {
        Some(values) => values[start * width..end * width].into(),
        None => m
            .slice(s![start..end, ..])
            .iter()
            .copied()
            .collect::<Vec<_>>()
            .into(),
    }
}

/// The means L⁻¹b of items given the packed data parts of their precisions (`[items,
/// R(R+1)/2]`, L = I + that) and their linear terms (`[items, R]`), in f64, `[items·R]`. Where L
/// is not numerically positive definite (only non-finite statistics could cause that) the mean
/// is b, as in `posterior_from`.
fn solve_means(precisions: &[f32], linear: &[f32], rank: usize) -> Vec<f64> {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
        {
            // SAFETY: the CPU supports AVX2 and FMA, checked just above.
            return unsafe { solve_means_avx2(precisions, linear, rank) };
        }
    }
    solve_means_portable(precisions, linear, rank)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn solve_means_avx2(precisions: &[f32], linear: &[f32], rank: usize) -> Vec<f64> {
    solve_means_portable(precisions, linear, rank)
}

#[inline(always)]
fn solve_means_portable(precisions: &[f32], linear: &[f32], rank: usize) -> Vec<f64> {
    let packed = packed_len(rank);
    let mut means = Vec::with_capacity(linear.len());
    let mut precision = vec![0.0f64; rank * rank];
    for (data, b) in precisions
        .chunks_exact(packed)
        .zip(linear.chunks_exact(rank))
    {
        let mut k = 0;
        for row in 0..rank {
            for column in 0..=row {
                precision[row * rank + column] = f64::from(data[k]);
                k += 1;
            }
            precision[row * rank + row] += 1.0;
        }
        let mut mean: Vec<f64> = b.iter().map(|&v| f64::from(v)).collect();
        solve_positive_definite_in_place(&mut precision, rank, &mut mean);
        means.extend(mean);
    }
    means
}

fn outer(a: ArrayView1<f64>, b: ArrayView1<f64>) -> Array2<f64> {
    a.insert_axis(Axis(1)).dot(&b.insert_axis(Axis(0)))
}

/// Posterior mean (and covariance) from the precision L and the linear term b.
fn posterior_from(
    precision: Array2<f64>,
    linear: ArrayView1<f64>,
    with_covariance: bool,
) -> FactorPosterior {
    // L = I + Σ N_c·(positive semi-definite) is positive definite for any non-negative
    // occupancy; a failure would mean non-finite statistics, which the callers refuse.
    let factor = cholesky(precision.view()).unwrap_or_else(|| Array2::eye(precision.nrows()));
    let mean = cholesky_solve(factor.view(), linear);
    let log_likelihood = 0.5 * linear.dot(&mean) - 0.5 * cholesky_log_determinant(factor.view());
    let covariance = if with_covariance {
        cholesky_inverse(factor.view())
    } else {
        Array2::zeros((0, 0))
    };
    FactorPosterior {
        mean,
        covariance,
        log_likelihood,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ubm::BaumWelchStats;

    fn toy_ubm() -> DiagGmm {
        DiagGmm::new(
            ndarray::arr1(&[0.4, 0.35, 0.25]),
            ndarray::arr2(&[[0.0, 1.0, -0.5], [2.0, -1.0, 0.0], [-1.5, 0.5, 1.0]]),
            ndarray::arr2(&[[1.0, 0.5, 0.7], [0.3, 2.0, 1.1], [0.8, 0.8, 0.4]]),
        )
        .unwrap()
    }

    /// Frames of `items` items, each drawn around the UBM's means shifted by T_true·w_i.
    fn toy_items(
        ubm: &DiagGmm,
        truth: &TotalVariability,
        items: usize,
        seed: u64,
    ) -> Vec<Array2<f32>> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut normal = move || {
            let u: f64 = rng.random_range(f64::MIN_POSITIVE..1.0);
            let v: f64 = rng.random_range(0.0..1.0);
            (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
        };
        (0..items)
            .map(|i| {
                let w = Array1::from_iter((0..truth.rank()).map(|_| normal()));
                let shift = truth.matrix().dot(&w);
                let frames = 60 + 17 * (i % 5);
                Array2::from_shape_fn((frames, 3), |(t, d)| {
                    let c = (t * 7 + i) % 3;
                    let mean = ubm.means()[(c, d)] + shift[c * 3 + d];
                    (mean + normal() * ubm.variances()[(c, d)].sqrt()) as f32
                })
            })
            .collect()
    }

    fn stack(ubm: &DiagGmm, stats: &[BaumWelchStats]) -> (Array2<f64>, Array2<f64>) {
        let (c, d) = (ubm.gaussians(), ubm.dims());
        let mut occupancy = Array2::zeros((stats.len(), c));
        let mut centred = Array2::zeros((stats.len(), c * d));
        for (i, s) in stats.iter().enumerate() {
            occupancy.row_mut(i).assign(&s.occupancy);
            centred.row_mut(i).assign(
                &s.centred_first_order(ubm)
                    .into_shape_with_order(c * d)
                    .unwrap(),
            );
        }
        (occupancy, centred)
    }

    #[test]
    fn posterior_equals_the_direct_formula_with_full_matrices() {
        let ubm = toy_ubm();
        let tv = TotalVariability::random(&ubm, 2, 5).unwrap();
        let items = toy_items(&ubm, &tv, 3, 6);
        let stats: Vec<_> = items.iter().map(|f| ubm.statistics(f.view(), 0)).collect();
        let (occupancy, centred) = stack(&ubm, &stats);
        let posteriors = tv.posteriors(occupancy.view(), centred.view());
        for (i, posterior) in posteriors.iter().enumerate() {
            // Direct: L = I + Σ_c N_c T_cᵀ Σ_c⁻¹ T_c, b = Σ_c T_cᵀ Σ_c⁻¹ F̃_c, with full matrices.
            let mut precision = Array2::<f64>::eye(2);
            let mut linear = Array1::<f64>::zeros(2);
            for c in 0..3 {
                let t_c = tv.matrix().slice(s![c * 3..c * 3 + 3, ..]).to_owned();
                let sigma_inv = Array2::from_diag(&ubm.variances().row(c).mapv(|v| 1.0 / v));
                precision = precision + t_c.t().dot(&sigma_inv).dot(&t_c) * occupancy[(i, c)];
                linear = linear
                    + t_c
                        .t()
                        .dot(&sigma_inv)
                        .dot(&centred.slice(s![i, c * 3..c * 3 + 3]));
            }
            let mean = cholesky_solve(cholesky(precision.view()).unwrap().view(), linear.view());
            assert!((&mean - &posterior.mean).iter().all(|v| v.abs() < 1e-12));
            let identity = precision.dot(&posterior.covariance);
            assert!((&identity - &Array2::<f64>::eye(2))
                .iter()
                .all(|v| v.abs() < 1e-12));
        }
    }

    /// The single-precision means against the f64 ones on statistics of the default sizes
    /// (128 Gaussians, 39 dims, R = 40) and of windows of 10 s at stride 3 (333 frames) down to
    /// one frame, with T as initialised and ten times larger (a longer-trained T is larger than
    /// the initial one, and its precisions worse conditioned).
    #[test]
    fn single_precision_means_stay_close_to_the_f64_ones() {
        let (gaussians, dims, rank) = (128, 39, 40);
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let weights = Array1::from_elem(gaussians, 1.0 / gaussians as f64);
        let means = Array2::from_shape_fn((gaussians, dims), |_| rng.random_range(-2.0..2.0));
        let variances = Array2::from_shape_fn((gaussians, dims), |_| rng.random_range(0.2..2.0));
        let ubm = DiagGmm::new(weights, means, variances).unwrap();
        let mut worst: f64 = 0.0;
        for scale in [1.0, 10.0] {
            let initial = TotalVariability::random(&ubm, rank, 12).unwrap();
            let tv = TotalVariability::new(initial.matrix() * scale, &ubm).unwrap();
            for frames in [1.0, 20.0, 100.0, 333.0] {
                let items = 8;
                let mut occupancy = Array2::<f64>::zeros((items, gaussians));
                let mut centred = Array2::<f64>::zeros((items, gaussians * dims));
                for i in 0..items {
                    let w = Array1::from_iter((0..rank).map(|_| rng.random_range(-2.0..2.0)));
                    let shift = tv.matrix().dot(&w);
                    // Occupancy concentrated on a few Gaussians, as a window's is.
                    let raw: Vec<f64> = (0..gaussians)
                        .map(|_| rng.random_range(0.0f64..1.0).powi(6))
                        .collect();
                    let total: f64 = raw.iter().sum();
                    for c in 0..gaussians {
                        let n = frames * raw[c] / total;
                        occupancy[(i, c)] = n;
                        for d in 0..dims {
                            let sd = ubm.variances()[(c, d)].sqrt();
                            let noise = rng.random_range(-1.0..1.0) * sd * n.sqrt();
                            centred[(i, c * dims + d)] = n * shift[c * dims + d] + noise;
                        }
                    }
                }
                let exact = tv.posterior_means(occupancy.view(), centred.view());
                let single = tv.posterior_means_single(
                    occupancy.mapv(|v| v as f32).view(),
                    centred.mapv(|v| v as f32).view(),
                );
                for (a, b) in exact.rows().into_iter().zip(single.rows()) {
                    let norm = a.dot(&a).sqrt();
                    let error = (&a - &b).iter().fold(0.0f64, |m, v| m.max(v.abs()));
                    worst = worst.max(error / norm.max(1e-3));
                }
            }
        }
        println!("single precision: max |difference| / |mean| = {worst:.2e}");
        // Measured: 3.6e-7.
        assert!(worst < 1e-5, "{worst:.2e}");
    }

    #[test]
    fn em_raises_the_log_likelihood_with_and_without_minimum_divergence() {
        let ubm = toy_ubm();
        let truth = TotalVariability::random(&ubm, 2, 7).unwrap();
        let items = toy_items(&ubm, &truth, 40, 8);
        let stats: Vec<_> = items.iter().map(|f| ubm.statistics(f.view(), 0)).collect();
        let (occupancy, centred) = stack(&ubm, &stats);
        for minimum_divergence in [false, true] {
            let mut tv = TotalVariability::random(&ubm, 2, 9).unwrap();
            let mut values = Vec::new();
            for _ in 0..8 {
                let (next, value) = tv
                    .em_iteration(&ubm, occupancy.view(), centred.view(), minimum_divergence)
                    .unwrap();
                values.push(value);
                tv = next;
            }
            values.push(tv.log_likelihood(occupancy.view(), centred.view()));
            for pair in values.windows(2) {
                assert!(pair[1] > pair[0] - 1e-9, "{minimum_divergence}: {values:?}");
            }
            assert!(values[values.len() - 1] > values[0] + 1.0, "{values:?}");
        }
    }
}

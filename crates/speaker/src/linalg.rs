//! The small dense linear algebra the models need, in f64: Cholesky factorisation and solves,
//! packed symmetric storage, and a symmetric eigendecomposition (cyclic Jacobi). Matrices here
//! are R×R with R the i-vector dimension (tens to a few hundred), so plain loops suffice; the
//! large products go through ndarray's matrix multiplication elsewhere.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, ArrayViewMut1};

/// Lower-triangular L with L·Lᵀ = `a`, or `None` when `a` is not (numerically) positive definite.
pub(crate) fn cholesky(a: ArrayView2<f64>) -> Option<Array2<f64>> {
    let n = a.nrows();
    let mut l = Array2::<f64>::zeros((n, n));
    for i in 0..n {
        for j in 0..=i {
            let mut sum = a[(i, j)];
            for k in 0..j {
                sum -= l[(i, k)] * l[(j, k)];
            }
            if i == j {
                if !(sum > 0.0 && sum.is_finite()) {
                    return None;
                }
                l[(i, i)] = sum.sqrt();
            } else {
                l[(i, j)] = sum / l[(j, j)];
            }
        }
    }
    Some(l)
}

/// Solves L·y = b in place (forward substitution).
pub(crate) fn solve_lower_in_place(l: ArrayView2<f64>, b: &mut [f64]) {
    let n = l.nrows();
    for i in 0..n {
        let mut sum = b[i];
        for k in 0..i {
            sum -= l[(i, k)] * b[k];
        }
        b[i] = sum / l[(i, i)];
    }
}

/// Solves Lᵀ·x = y in place (back substitution with the transpose of a lower factor).
pub(crate) fn solve_lower_transposed_in_place(l: ArrayView2<f64>, y: &mut [f64]) {
    let n = l.nrows();
    for i in (0..n).rev() {
        let mut sum = y[i];
        for k in i + 1..n {
            sum -= l[(k, i)] * y[k];
        }
        y[i] = sum / l[(i, i)];
    }
}

/// x with A·x = b, given the Cholesky factor L of A.
pub(crate) fn cholesky_solve(l: ArrayView2<f64>, b: ArrayView1<f64>) -> Array1<f64> {
    let mut x = b.to_vec();
    solve_lower_in_place(l, &mut x);
    solve_lower_transposed_in_place(l, &mut x);
    Array1::from(x)
}

/// A⁻¹ given the Cholesky factor L of A (column by column).
pub(crate) fn cholesky_inverse(l: ArrayView2<f64>) -> Array2<f64> {
    let n = l.nrows();
    let mut inverse = Array2::<f64>::zeros((n, n));
    let mut column = vec![0.0; n];
    for j in 0..n {
        column.iter_mut().for_each(|v| *v = 0.0);
        column[j] = 1.0;
        solve_lower_in_place(l, &mut column);
        solve_lower_transposed_in_place(l, &mut column);
        for i in 0..n {
            inverse[(i, j)] = column[i];
        }
    }
    // Exactly symmetric, whatever the rounding of the two solves.
    for i in 0..n {
        for j in 0..i {
            let mean = 0.5 * (inverse[(i, j)] + inverse[(j, i)]);
            inverse[(i, j)] = mean;
            inverse[(j, i)] = mean;
        }
    }
    inverse
}

/// log det A = 2 Σ log Lᵢᵢ, given the Cholesky factor L of A.
pub(crate) fn cholesky_log_determinant(l: ArrayView2<f64>) -> f64 {
    2.0 * l.diag().iter().map(|v| v.ln()).sum::<f64>()
}

/// Entries of the lower triangle (diagonal included) of an n×n matrix.
pub(crate) fn packed_len(n: usize) -> usize {
    n * (n + 1) / 2
}

/// Writes the lower triangle of symmetric `a` row by row into `out` (`packed_len(n)` values).
pub(crate) fn pack_lower(a: ArrayView2<f64>, mut out: ArrayViewMut1<f64>) {
    let mut k = 0;
    for i in 0..a.nrows() {
        for j in 0..=i {
            out[k] = a[(i, j)];
            k += 1;
        }
    }
}

/// The symmetric n×n matrix whose lower triangle `packed` holds row by row.
pub(crate) fn unpack_symmetric(packed: ArrayView1<f64>, n: usize) -> Array2<f64> {
    let mut a = Array2::<f64>::zeros((n, n));
    let mut k = 0;
    for i in 0..n {
        for j in 0..=i {
            a[(i, j)] = packed[k];
            a[(j, i)] = packed[k];
            k += 1;
        }
    }
    a
}

/// Σ x_k·y_k with four partial sums (so that the compiler can vectorise it).
#[inline(always)]
fn dot(x: &[f64], y: &[f64]) -> f64 {
    let mut partial = [0.0f64; 4];
    let split = x.len().min(y.len()) / 4 * 4;
    for (x4, y4) in x[..split].chunks_exact(4).zip(y[..split].chunks_exact(4)) {
        for j in 0..4 {
            partial[j] += x4[j] * y4[j];
        }
    }
    let rest: f64 = x[split..].iter().zip(&y[split..]).map(|(a, b)| a * b).sum();
    (partial[0] + partial[1]) + (partial[2] + partial[3]) + rest
}

/// Solves A·x = b for symmetric positive definite A given as its lower triangle, row-major
/// `n × n` in `a` (the upper triangle is ignored; `a` is overwritten with the Cholesky factor),
/// and `b` becomes x. Returns false (leaving `b` unchanged) when A is not numerically positive
/// definite. The factorisation is the right-looking form of [`cholesky`]: after column j is
/// done, its outer product is subtracted from the rest of the lower triangle row by row, so
/// that the inner loop is a contiguous update the compiler can vectorise (the sums differ from
/// [`cholesky`]'s by rounding only).
#[inline(always)]
pub(crate) fn solve_positive_definite_in_place(a: &mut [f64], n: usize, b: &mut [f64]) -> bool {
    if a.len() != n * n || b.len() != n {
        return false;
    }
    let mut column = vec![0.0f64; n];
    for j in 0..n {
        let pivot = a[j * n + j];
        if !(pivot > 0.0 && pivot.is_finite()) {
            return false;
        }
        let diagonal = pivot.sqrt();
        a[j * n + j] = diagonal;
        for i in j + 1..n {
            a[i * n + j] /= diagonal;
            column[i] = a[i * n + j];
        }
        // A[i][k] −= L[i][j]·L[k][j] for j < k ≤ i.
        for i in j + 1..n {
            let weight = column[i];
            let row = &mut a[i * n + j + 1..i * n + i + 1];
            for (value, &l) in row.iter_mut().zip(&column[j + 1..i + 1]) {
                *value -= weight * l;
            }
        }
    }
    // L·y = b, then Lᵀ·x = y.
    let mut y = b.to_vec();
    for i in 0..n {
        let row = &a[i * n..i * n + n];
        y[i] = (y[i] - dot(&row[..i], &y[..i])) / row[i];
    }
    for i in (0..n).rev() {
        let mut sum = y[i];
        for k in i + 1..n {
            sum -= a[k * n + i] * y[k];
        }
        y[i] = sum / a[i * n + i];
    }
    b.copy_from_slice(&y);
    true
}

/// Eigenvalues (descending) and eigenvectors (the matching columns, orthonormal) of symmetric
/// `a`, by cyclic Jacobi rotations until the off-diagonal mass is below 1e-24 of the total.
pub(crate) fn symmetric_eigen(mut a: Array2<f64>) -> (Array1<f64>, Array2<f64>) {
    let n = a.nrows();
    let mut vectors = Array2::<f64>::eye(n);
    let total: f64 = a.iter().map(|v| v * v).sum();
    for _sweep in 0..100 {
        let mut off = 0.0;
        for p in 0..n {
            for q in p + 1..n {
                off += a[(p, q)] * a[(p, q)];
            }
        }
        if off <= 1e-24 * total || off == 0.0 {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = a[(p, q)];
                if apq == 0.0 {
                    continue;
                }
                // The rotation angle that zeroes a[p][q] (the textbook Jacobi step, with the
                // smaller root of t² + 2θt − 1 = 0 for stability).
                let theta = (a[(q, q)] - a[(p, p)]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let akp = a[(k, p)];
                    let akq = a[(k, q)];
                    a[(k, p)] = c * akp - s * akq;
                    a[(k, q)] = s * akp + c * akq;
                }
                for k in 0..n {
                    let apk = a[(p, k)];
                    let aqk = a[(q, k)];
                    a[(p, k)] = c * apk - s * aqk;
                    a[(q, k)] = s * apk + c * aqk;
                }
                for k in 0..n {
                    let vkp = vectors[(k, p)];
                    let vkq = vectors[(k, q)];
                    vectors[(k, p)] = c * vkp - s * vkq;
                    vectors[(k, q)] = s * vkp + c * vkq;
                }
            }
        }
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| a[(j, j)].total_cmp(&a[(i, i)]));
    let values = Array1::from_iter(order.iter().map(|&i| a[(i, i)]));
    let sorted = Array2::from_shape_fn((n, n), |(k, j)| vectors[(k, order[j])]);
    (values, sorted)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_positive_definite(n: usize, seed: u64) -> Array2<f64> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let b = Array2::from_shape_fn((n, n + 3), |_| rng.random_range(-1.0..1.0));
        b.dot(&b.t()) + Array2::<f64>::eye(n) * 0.1
    }

    fn max_abs_difference(a: &Array2<f64>, b: &Array2<f64>) -> f64 {
        (a - b).iter().fold(0.0f64, |m, v| m.max(v.abs()))
    }

    #[test]
    fn cholesky_reconstructs_and_solves_against_the_definition() {
        for n in [1, 2, 7, 40] {
            let a = random_positive_definite(n, n as u64);
            let l = cholesky(a.view()).unwrap();
            // Definition: L lower triangular with L·Lᵀ = A.
            assert!(max_abs_difference(&l.dot(&l.t()), &a) < 1e-10);
            for i in 0..n {
                for j in i + 1..n {
                    assert_eq!(l[(i, j)], 0.0);
                }
            }
            let inverse = cholesky_inverse(l.view());
            assert!(max_abs_difference(&a.dot(&inverse), &Array2::eye(n)) < 1e-9);
            let b = Array1::from_iter((0..n).map(|i| i as f64 - 1.5));
            let x = cholesky_solve(l.view(), b.view());
            assert!((a.dot(&x) - &b).iter().all(|v| v.abs() < 1e-9));
            let mut packed = Array1::zeros(packed_len(n));
            pack_lower(a.view(), packed.view_mut());
            assert_eq!(unpack_symmetric(packed.view(), n), a);
        }
    }

    #[test]
    fn the_flat_solve_equals_the_factor_and_solves() {
        for n in [1, 2, 5, 40] {
            let a = random_positive_definite(n, 50 + n as u64);
            let b = Array1::from_iter((0..n).map(|i| (i as f64 * 0.7).sin()));
            let expected = cholesky_solve(cholesky(a.view()).unwrap().view(), b.view());
            let mut flat = a.iter().copied().collect::<Vec<_>>();
            let mut x = b.to_vec();
            assert!(solve_positive_definite_in_place(&mut flat, n, &mut x));
            for (got, want) in x.iter().zip(&expected) {
                assert!(
                    (got - want).abs() <= 1e-10 * want.abs().max(1.0),
                    "{got} vs {want}"
                );
            }
        }
        let mut indefinite = vec![1.0, 2.0, 2.0, 1.0];
        let mut b = vec![1.0, 1.0];
        assert!(!solve_positive_definite_in_place(
            &mut indefinite,
            2,
            &mut b
        ));
        assert_eq!(b, vec![1.0, 1.0]);
    }

    #[test]
    fn log_determinant_matches_a_hand_worked_example() {
        // det [[4, 2], [2, 3]] = 12 − 4 = 8.
        let a = ndarray::arr2(&[[4.0, 2.0], [2.0, 3.0]]);
        let l = cholesky(a.view()).unwrap();
        assert!((cholesky_log_determinant(l.view()) - 8f64.ln()).abs() < 1e-14);
        assert!(cholesky(ndarray::arr2(&[[1.0, 2.0], [2.0, 1.0]]).view()).is_none());
    }

    #[test]
    fn jacobi_eigen_satisfies_the_definition() {
        // Hand-worked: [[2, 1], [1, 2]] has eigenvalues 3 and 1.
        let (values, _) = symmetric_eigen(ndarray::arr2(&[[2.0, 1.0], [1.0, 2.0]]));
        assert!((values[0] - 3.0).abs() < 1e-12 && (values[1] - 1.0).abs() < 1e-12);
        for n in [1, 3, 12, 40] {
            let a = random_positive_definite(n, 100 + n as u64);
            let (values, vectors) = symmetric_eigen(a.clone());
            // A·V = V·diag(λ), VᵀV = I, λ sorted descending.
            let av = a.dot(&vectors);
            let vl = &vectors * &values.view().insert_axis(ndarray::Axis(0));
            assert!(max_abs_difference(&av, &vl) < 1e-9, "n = {n}");
            assert!(max_abs_difference(&vectors.t().dot(&vectors), &Array2::eye(n)) < 1e-10);
            assert!(values.windows(2).into_iter().all(|w| w[0] >= w[1]));
        }
    }
}

//! What happens to an i-vector after extraction, in this order: subtraction of the training
//! mean, projection onto linear-discriminant directions between speakers, length normalisation.

use std::collections::BTreeMap;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};

use crate::linalg::{
    cholesky, solve_lower_in_place, solve_lower_transposed_in_place, symmetric_eigen,
};
use crate::SpeakerError;

/// The post-processing an extractor applies to every vector it hands out.
#[derive(Debug, Clone, PartialEq)]
pub struct Postprocessing {
    /// Mean subtracted first, `[R]`.
    pub mean: Option<Array1<f64>>,
    /// LDA projection `[R_out, R]` applied next (rows are the directions).
    pub lda: Option<Array2<f64>>,
    /// Whether the result is scaled to length √(dimension).
    pub length_normalize: bool,
}

impl Postprocessing {
    /// Dimension of the vectors this produces from R-dimensional input.
    pub fn output_dimension(&self, rank: usize) -> usize {
        self.lda.as_ref().map_or(rank, |lda| lda.nrows())
    }

    /// Applies the steps to one i-vector.
    pub fn apply(&self, ivector: ArrayView1<f64>) -> Array1<f32> {
        let mut vector = ivector.to_owned();
        if let Some(mean) = &self.mean {
            vector -= mean;
        }
        if let Some(lda) = &self.lda {
            vector = lda.dot(&vector);
        }
        if self.length_normalize {
            let norm = vector.dot(&vector).sqrt();
            // A zero vector has no direction; it stays zero.
            if norm > 0.0 {
                vector *= (vector.len() as f64).sqrt() / norm;
            }
        }
        vector.mapv(|v| v as f32)
    }
}

/// Linear discriminant analysis of `vectors` (`[items, R]`) labelled by `labels`: the leading
/// `dimension` directions v of S_b v = λ S_w v, with
///
/// ```text
/// S_w = (1/n) Σ_k Σ_{i∈k} (x_i − μ_k)(x_i − μ_k)ᵀ,   S_b = (1/n) Σ_k n_k (μ_k − μ)(μ_k − μ)ᵀ,
/// ```
///
/// scaled so that the projected within-class covariance is the identity (vᵀ S_w v = 1). Returns
/// the projection `[dimension, R]` (one direction a row). Solved by whitening with the Cholesky
/// factor of S_w and a symmetric eigendecomposition.
pub fn train_lda(
    vectors: ArrayView2<f64>,
    labels: &[&str],
    dimension: usize,
) -> Result<Array2<f64>, SpeakerError> {
    let (items, rank) = vectors.dim();
    let mut classes: BTreeMap<&str, Vec<usize>> = BTreeMap::new();
    for (i, label) in labels.iter().enumerate() {
        classes.entry(label).or_default().push(i);
    }
    if classes.len() <= dimension {
        return Err(SpeakerError::Training {
            problem: format!(
                "LDA to {dimension} dimensions (setting `lda_dimension`) needs at least {} training speakers, found {}",
                dimension + 1,
                classes.len()
            ),
        });
    }
    let n = items as f64;
    let mean = vectors
        .mean_axis(Axis(0))
        .unwrap_or_else(|| Array1::zeros(rank));
    let mut within = Array2::<f64>::zeros((rank, rank));
    let mut between = Array2::<f64>::zeros((rank, rank));
    for members in classes.values() {
        let class_mean = members
            .iter()
            .fold(Array1::<f64>::zeros(rank), |sum, &i| sum + vectors.row(i))
            / members.len() as f64;
        for &i in members {
            let diff = &vectors.row(i) - &class_mean;
            within += &outer(&diff, &diff);
        }
        let diff = &class_mean - &mean;
        between += &(outer(&diff, &diff) * members.len() as f64);
    }
    within /= n;
    between /= n;
    // A tiny ridge keeps S_w invertible when classes have fewer members than dimensions.
    let ridge = 1e-9 * within.diag().sum() / rank as f64;
    within
        .diag_mut()
        .iter_mut()
        .for_each(|v| *v += ridge.max(f64::MIN_POSITIVE));
    let factor = cholesky(within.view()).ok_or_else(|| SpeakerError::Training {
        problem:
            "the within-speaker scatter of the training i-vectors is singular; LDA is impossible"
                .into(),
    })?;
    // M = L⁻¹ S_b L⁻ᵀ, symmetric; its eigenvectors u give the directions v = L⁻ᵀu.
    let mut whitened = between.clone();
    for mut column in whitened.columns_mut() {
        let mut values = column.to_vec();
        solve_lower_in_place(factor.view(), &mut values);
        column.assign(&Array1::from(values));
    }
    for mut row in whitened.rows_mut() {
        let mut values = row.to_vec();
        solve_lower_in_place(factor.view(), &mut values);
        row.assign(&Array1::from(values));
    }
    let symmetric = (&whitened + &whitened.t()) * 0.5;
    let (_, eigenvectors) = symmetric_eigen(symmetric);
    let mut projection = Array2::<f64>::zeros((dimension, rank));
    for k in 0..dimension {
        let mut direction = eigenvectors.column(k).to_vec();
        solve_lower_transposed_in_place(factor.view(), &mut direction);
        projection.row_mut(k).assign(&Array1::from(direction));
    }
    Ok(projection)
}

fn outer(a: &Array1<f64>, b: &Array1<f64>) -> Array2<f64> {
    a.view()
        .insert_axis(Axis(1))
        .dot(&b.view().insert_axis(Axis(0)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn lda_whitens_the_within_class_scatter_and_finds_the_separating_direction() {
        // Three classes apart along (1, 1, 0), spread widely along (1, −1, 0) and z.
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        for (k, label) in ["a", "b", "c"].iter().enumerate() {
            for _ in 0..50 {
                let along = k as f64 * 2.0 + rng.random_range(-0.3..0.3);
                let across = rng.random_range(-3.0..3.0);
                rows.extend([along + across, along - across, rng.random_range(-2.0..2.0)]);
                labels.push(*label);
            }
        }
        let vectors = Array2::from_shape_vec((150, 3), rows).unwrap();
        let projection = train_lda(vectors.view(), &labels, 1).unwrap();
        let direction = projection.row(0).to_owned();
        let cosine =
            (direction[0] + direction[1]) / (2f64.sqrt() * direction.dot(&direction).sqrt());
        assert!(cosine.abs() > 0.99, "{direction}");
        // Projected within-class variance is 1 (the normalisation the doc promises).
        let projected = vectors.dot(&direction);
        let mut within = 0.0;
        for k in 0..3 {
            let part = projected.slice(ndarray::s![k * 50..(k + 1) * 50]);
            let mean = part.mean().unwrap();
            within += part.iter().map(|v| (v - mean).powi(2)).sum::<f64>();
        }
        assert!((within / 150.0 - 1.0).abs() < 1e-6);
        let error = train_lda(vectors.view(), &labels, 3)
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("at least 4 training speakers, found 3"),
            "{error}"
        );
    }

    #[test]
    fn postprocessing_subtracts_projects_and_normalises() {
        let post = Postprocessing {
            mean: Some(ndarray::arr1(&[1.0, 1.0])),
            lda: Some(ndarray::arr2(&[[2.0, 0.0], [0.0, 1.0], [1.0, 1.0]])),
            length_normalize: true,
        };
        let out = post.apply(ndarray::arr1(&[2.0, 3.0]).view());
        // (1, 2) → (2, 2, 3) → scaled to length √3.
        let norm = (4.0f64 + 4.0 + 9.0).sqrt();
        let expected = [2.0, 2.0, 3.0].map(|v| (v * 3f64.sqrt() / norm) as f32);
        assert_eq!(out.to_vec(), expected.to_vec());
        let zero = post.apply(ndarray::arr1(&[1.0, 1.0]).view());
        assert!(zero.iter().all(|v| *v == 0.0));
        assert_eq!(post.output_dimension(2), 3);
    }
}

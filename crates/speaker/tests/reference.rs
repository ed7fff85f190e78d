//! The UBM, the i-vector posterior, one T update and LDA against scikit-learn and numpy.
//!
//! Fixture: `tests/fixtures/speaker/reference.json` at the repository root, written by
//! `scripts/reference/ivector_reference.py` (scikit-learn's `GaussianMixture` and
//! `LinearDiscriminantAnalysis`, the closed forms of the factor posterior and the T update in
//! numpy; versions recorded in the file).

use std::path::Path;

use isogloss_speaker::postprocess::train_lda;
use isogloss_speaker::{
    DiagGmm, ExtractorConfig, FeatureLayout, IvectorExtractor, Postprocessing, TotalVariability,
    UbmConfig,
};
use ndarray::{Array1, Array2, ArrayView1};
use serde_json::Value;

fn fixture() -> Value {
    let path =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/fixtures/speaker/reference.json");
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn vector(value: &Value) -> Array1<f64> {
    value
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

fn matrix(value: &Value) -> Array2<f64> {
    let rows: Vec<Array1<f64>> = value.as_array().unwrap().iter().map(vector).collect();
    let columns = rows.first().map_or(0, |r| r.len());
    Array2::from_shape_fn((rows.len(), columns), |(i, j)| rows[i][j])
}

/// Frames as the f32 the crate takes; the fixture holds float32-representable values.
fn frames(value: &Value) -> Array2<f32> {
    matrix(value).mapv(|v| v as f32)
}

fn max_abs_difference<'a>(
    a: impl IntoIterator<Item = &'a f64>,
    b: impl IntoIterator<Item = &'a f64>,
) -> f64 {
    a.into_iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
}

fn gmm(section: &Value) -> DiagGmm {
    DiagGmm::new(
        vector(&section["weights"]),
        matrix(&section["means"]),
        matrix(&section["variances"]),
    )
    .unwrap()
}

#[test]
fn ubm_log_likelihoods_and_posteriors_equal_scikit_learn() {
    let fixture = fixture();
    let section = &fixture["gmm"];
    let ubm = gmm(section);
    let x = frames(&section["frames"]);

    let weighted = ubm.weighted_log_likelihoods(x.view());
    let error = max_abs_difference(&weighted, &matrix(&section["weighted_log_likelihoods"]));
    println!("weighted log-likelihoods: max |difference| {error:.2e}");
    // scikit-learn GaussianMixture._estimate_weighted_log_prob, diag covariances: ≤ 1e-6.
    assert!(error <= 1e-6, "{error:.2e}");

    let per_frame = ubm.log_likelihoods(x.view());
    let error = max_abs_difference(&per_frame, &vector(&section["log_likelihoods"]));
    println!("frame log-likelihoods: max |difference| {error:.2e}");
    // scikit-learn GaussianMixture.score_samples: ≤ 1e-6.
    assert!(error <= 1e-6, "{error:.2e}");

    let posteriors = ubm.posteriors(x.view(), 0);
    let error = max_abs_difference(&posteriors, &matrix(&section["posteriors"]));
    println!("posteriors: max |difference| {error:.2e}");
    // scikit-learn GaussianMixture.predict_proba: ≤ 1e-6.
    assert!(error <= 1e-6, "{error:.2e}");
}

#[test]
fn one_em_iteration_equals_a_scikit_learn_m_step() {
    let fixture = fixture();
    let section = &fixture["gmm"];
    let ubm = gmm(section);
    let x = frames(&section["frames"]);
    let reg_covar = section["reg_covar"].as_f64().unwrap();
    // No floor, regularisation = reg_covar: scikit-learn's M-step exactly.
    let (updated, _) = ubm
        .em_iteration(&[x.view()], Array1::zeros(3).view(), reg_covar)
        .unwrap();
    let expected = &section["m_step"];
    for (name, ours, theirs) in [
        (
            "weights",
            updated.weights().view().into_dyn(),
            vector(&expected["weights"]).into_dyn(),
        ),
        (
            "means",
            updated.means().view().into_dyn(),
            matrix(&expected["means"]).into_dyn(),
        ),
        (
            "variances",
            updated.variances().view().into_dyn(),
            matrix(&expected["variances"]).into_dyn(),
        ),
    ] {
        let error = max_abs_difference(ours.iter(), theirs.iter());
        println!("M-step {name}: max |difference| {error:.2e}");
        // scikit-learn GaussianMixture._e_step + _m_step (reg_covar = 1e-3): ≤ 1e-6.
        assert!(error <= 1e-6, "{name}: {error:.2e}");
    }
}

#[test]
fn statistics_ivectors_and_t_update_equal_the_numpy_closed_forms() {
    let fixture = fixture();
    let section = &fixture["ivector"];
    let ubm = gmm(section);
    let t = matrix(&section["t_matrix"]);
    let total_variability = TotalVariability::new(t.clone(), &ubm).unwrap();
    let utterances: Vec<Array2<f32>> = section["utterances"]
        .as_array()
        .unwrap()
        .iter()
        .map(frames)
        .collect();
    let items = utterances.len();
    let mut occupancy = Array2::<f64>::zeros((items, 3));
    let mut centred = Array2::<f64>::zeros((items, 6));
    for (i, utterance) in utterances.iter().enumerate() {
        let stats = ubm.statistics(utterance.view(), 0);
        let error_n = max_abs_difference(&stats.occupancy, &vector(&section["occupancies"][i]));
        let f = stats.centred_first_order(&ubm);
        let error_f = max_abs_difference(&f, &matrix(&section["centred_first_order"][i]));
        // numpy: N_c = Σ γ, F̃_c = Σ γ (x − μ_c) with posteriors by log-sum-exp: ≤ 1e-6.
        assert!(
            error_n <= 1e-6 && error_f <= 1e-6,
            "utterance {i}: {error_n:.2e} {error_f:.2e}"
        );
        occupancy.row_mut(i).assign(&stats.occupancy);
        centred
            .row_mut(i)
            .assign(&Array1::from_iter(f.iter().copied()));
    }

    let posteriors = total_variability.posteriors(occupancy.view(), centred.view());
    let mut worst: f64 = 0.0;
    for (i, posterior) in posteriors.iter().enumerate() {
        worst = worst.max(max_abs_difference(
            &posterior.mean,
            &vector(&section["ivectors"][i]),
        ));
        worst = worst.max(max_abs_difference(
            &posterior.covariance,
            &matrix(&section["covariances"][i]),
        ));
    }
    println!("i-vector posterior mean and covariance: max |difference| {worst:.2e}");
    // numpy: w = solve(L, b), Cov = inv(L) with L, b summed Gaussian by Gaussian: ≤ 1e-6.
    assert!(worst <= 1e-6, "{worst:.2e}");
    let log_likelihood = total_variability.log_likelihood(occupancy.view(), centred.view());
    let expected = section["log_likelihood"].as_f64().unwrap();
    // numpy: Σ_s ½ bᵀw − ½ log det L: ≤ 1e-6.
    assert!(
        (log_likelihood - expected).abs() <= 1e-6,
        "{log_likelihood} vs {expected}"
    );

    for (minimum_divergence, key) in [
        (false, "t_after_em"),
        (true, "t_after_em_minimum_divergence"),
    ] {
        let (updated, _) = total_variability
            .em_iteration(&ubm, occupancy.view(), centred.view(), minimum_divergence)
            .unwrap();
        let error = max_abs_difference(updated.matrix(), &matrix(&section[key]));
        println!("{key}: max |difference| {error:.2e}");
        // numpy: T_c = (Σ F̃_c E[w]ᵀ)(Σ N_c E[wwᵀ])⁻¹ (then · chol(mean E[wwᵀ])): ≤ 1e-6.
        assert!(error <= 1e-6, "{key}: {error:.2e}");
    }

    // The same i-vectors through the extractor's public path (no post-processing).
    let config = ExtractorConfig {
        dimension: 2,
        subtract_mean: false,
        top_gaussians: 0,
        frame_stride: 1,
        ubm: UbmConfig {
            gaussians: 3,
            ..UbmConfig::default()
        },
        ..ExtractorConfig::default()
    };
    let extractor = IvectorExtractor::from_parts(
        config,
        FeatureLayout {
            dims: 2,
            frame_shift_seconds: 0.01,
        },
        ubm,
        total_variability,
        Postprocessing {
            mean: None,
            lda: None,
            length_normalize: false,
        },
    )
    .unwrap();
    for (i, utterance) in utterances.iter().enumerate() {
        let ours = extractor.extract("fixture", utterance.view()).unwrap();
        let expected = vector(&section["ivectors"][i]);
        for (a, b) in ours.iter().zip(&expected) {
            // numpy closed form, through the f32 output: ≤ 1e-6 relative to max(1, |value|).
            assert!(
                (f64::from(*a) - b).abs() <= 1e-6 * b.abs().max(1.0),
                "{a} vs {b}"
            );
        }
    }
}

#[test]
fn lda_directions_equal_scikit_learn() {
    let fixture = fixture();
    let section = &fixture["lda"];
    let vectors = matrix(&section["vectors"]);
    let labels: Vec<&str> = section["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    let ours = train_lda(vectors.view(), &labels, 2).unwrap();
    let theirs = matrix(&section["directions"]);
    let unit = |v: ArrayView1<f64>| &v / v.dot(&v).sqrt();
    for k in 0..2 {
        let (a, b) = (unit(ours.row(k)), unit(theirs.row(k)));
        let sign = a.dot(&b).signum();
        let error = max_abs_difference(&(a * sign), &b);
        println!("LDA direction {k}: max |difference| {error:.2e}");
        // scikit-learn LinearDiscriminantAnalysis(solver="eigen").scalings_, up to scale and
        // sign: ≤ 1e-6.
        assert!(error <= 1e-6, "direction {k}: {error:.2e}");
    }
}

#!/usr/bin/env python3
"""Reference values for isogloss-speaker: the UBM against scikit-learn, the i-vector posterior and
one total-variability EM update against the closed forms written out in numpy, LDA directions
against scikit-learn.

Sections of the JSON written to stdout:

  gmm       a fixed diagonal-covariance mixture (4 Gaussians, 3 dims) and 200 frames (float32
            values); sklearn.mixture.GaussianMixture(covariance_type="diag") with those parameters
            set gives score_samples (per-frame log-likelihood), predict_proba (posteriors) and
            _estimate_weighted_log_prob (log w_c + log N per Gaussian); one _e_step + _m_step with
            reg_covar = 1e-3 gives the updated weights, means and variances.
  ivector   a tiny model (3 Gaussians, 2 dims, T of rank 2) and the frames of 6 utterances. numpy:
            posteriors gamma_t(c) by log-sum-exp of the Gaussian densities, N_c = sum gamma,
            F~_c = sum gamma (x - mu_c); L = I + sum_c N_c T_c' S_c^-1 T_c, b = sum_c T_c' S_c^-1 F~_c,
            w = solve(L, b), Cov = inv(L); T-dependent log-likelihood 1/2 b'w - 1/2 log det L; one EM
            update T_c = (sum_s F~_c(s) E[w_s]') (sum_s N_c(s) E[w_s w_s'])^-1, without and with the
            minimum-divergence step T <- T chol(mean_s E[w_s w_s']).
  lda       three classes of 4-dimensional vectors; sklearn LinearDiscriminantAnalysis(solver="eigen")
            scalings_ (generalized eigenvectors of Sb v = l Sw v, unit length) for the 2 leading
            directions.

Run:  ../venv/bin/python scripts/reference/ivector_reference.py > tests/fixtures/speaker/reference.json
"""

import json
import sys

import numpy as np
import scipy
import scipy.special
import sklearn
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.mixture import GaussianMixture

rng = np.random.default_rng(15)


def f32(values):
    """Values rounded to float32 (what the Rust side reads), back in float64."""
    return np.asarray(values, dtype=np.float32).astype(np.float64)


def sample_mixture(weights, means, variances, n):
    components = rng.choice(len(weights), size=n, p=weights)
    noise = rng.standard_normal((n, means.shape[1]))
    return f32(means[components] + noise * np.sqrt(variances[components]))


def gmm_section():
    weights = np.array([0.4, 0.3, 0.2, 0.1])
    means = np.array([[0.0, 1.0, -0.5], [2.0, -1.0, 0.3], [-1.5, 0.5, 1.2], [0.7, 2.2, -2.0]])
    variances = np.array([[1.0, 0.5, 0.7], [0.3, 2.0, 1.1], [0.8, 0.8, 0.4], [0.2, 0.6, 1.5]])
    frames = sample_mixture(weights, means, variances, 200)
    gm = GaussianMixture(n_components=4, covariance_type="diag", reg_covar=1e-3)
    gm.weights_ = weights
    gm.means_ = means
    gm.covariances_ = variances
    gm.precisions_cholesky_ = 1.0 / np.sqrt(variances)
    score = gm.score_samples(frames)
    posteriors = gm.predict_proba(frames)
    weighted = gm._estimate_weighted_log_prob(frames)
    _, log_resp = gm._e_step(frames)
    gm._m_step(frames, log_resp)
    return {
        "weights": weights.tolist(),
        "means": means.tolist(),
        "variances": variances.tolist(),
        "frames": frames.tolist(),
        "log_likelihoods": score.tolist(),
        "posteriors": posteriors.tolist(),
        "weighted_log_likelihoods": weighted.tolist(),
        "reg_covar": 1e-3,
        "m_step": {
            "weights": gm.weights_.tolist(),
            "means": gm.means_.tolist(),
            "variances": gm.covariances_.tolist(),
        },
    }


def numpy_posteriors(frames, weights, means, variances):
    # log w_c + log N(x; mu_c, diag var_c), written out term by term.
    diff = frames[:, None, :] - means[None, :, :]
    log_density = -0.5 * (np.log(2 * np.pi * variances)[None] + diff**2 / variances[None]).sum(axis=2)
    weighted = np.log(weights)[None] + log_density
    return np.exp(weighted - scipy.special.logsumexp(weighted, axis=1, keepdims=True))


def ivector_section():
    c_count, dims, rank = 3, 2, 2
    weights = np.array([0.5, 0.3, 0.2])
    means = np.array([[0.0, 1.0], [2.0, -1.0], [-1.5, 0.5]])
    variances = np.array([[1.0, 0.5], [0.3, 2.0], [0.8, 0.8]])
    t_matrix = rng.standard_normal((c_count * dims, rank)) * 0.4
    utterances = []
    for length in [40, 75, 23, 60, 90, 33]:
        w = rng.standard_normal(rank)
        shifted = means + (t_matrix @ w).reshape(c_count, dims)
        utterances.append(sample_mixture(weights, shifted, variances, length))

    occupancies, centred = [], []
    for frames in utterances:
        gamma = numpy_posteriors(frames, weights, means, variances)
        n = gamma.sum(axis=0)
        f = gamma.T @ frames - n[:, None] * means
        occupancies.append(n)
        centred.append(f)

    def posterior(n, f, t):
        precision = np.eye(rank)
        linear = np.zeros(rank)
        for c in range(c_count):
            t_c = t[c * dims:(c + 1) * dims]
            s_inv = np.diag(1.0 / variances[c])
            precision += n[c] * t_c.T @ s_inv @ t_c
            linear += t_c.T @ s_inv @ f[c]
        mean = np.linalg.solve(precision, linear)
        log_likelihood = 0.5 * linear @ mean - 0.5 * np.linalg.slogdet(precision)[1]
        return mean, np.linalg.inv(precision), log_likelihood

    posteriors = [posterior(n, f, t_matrix) for n, f in zip(occupancies, centred)]

    def em_update(minimum_divergence):
        new_t = np.zeros_like(t_matrix)
        moments = [cov + np.outer(mean, mean) for mean, cov, _ in posteriors]
        for c in range(c_count):
            a = sum(n[c] * m for n, m in zip(occupancies, moments))
            cross = sum(np.outer(f[c], mean) for f, (mean, _, _) in zip(centred, posteriors))
            new_t[c * dims:(c + 1) * dims] = cross @ np.linalg.inv(a)
        if minimum_divergence:
            new_t = new_t @ np.linalg.cholesky(sum(moments) / len(moments))
        return new_t

    return {
        "weights": weights.tolist(),
        "means": means.tolist(),
        "variances": variances.tolist(),
        "t_matrix": t_matrix.tolist(),
        "utterances": [u.tolist() for u in utterances],
        "occupancies": [n.tolist() for n in occupancies],
        "centred_first_order": [f.tolist() for f in centred],
        "ivectors": [mean.tolist() for mean, _, _ in posteriors],
        "covariances": [cov.tolist() for _, cov, _ in posteriors],
        "log_likelihood": float(sum(ll for _, _, ll in posteriors)),
        "t_after_em": em_update(False).tolist(),
        "t_after_em_minimum_divergence": em_update(True).tolist(),
    }


def lda_section():
    centres = np.array([[0.0, 0.0, 0.0, 0.0], [2.0, 1.0, 0.0, -1.0], [-1.0, 2.5, 1.0, 0.5]])
    mixing = rng.standard_normal((4, 4)) * 0.6 + np.eye(4)
    vectors, labels = [], []
    for k, centre in enumerate(centres):
        for _ in range(40):
            vectors.append(centre + rng.standard_normal(4) @ mixing)
            labels.append(["north", "south", "west"][k])
    vectors = np.array(vectors)
    lda = LinearDiscriminantAnalysis(solver="eigen").fit(vectors, labels)
    return {
        "vectors": vectors.tolist(),
        "labels": labels,
        "directions": lda.scalings_[:, :2].T.tolist(),
    }


json.dump(
    {
        "source": "scripts/reference/ivector_reference.py",
        "versions": {
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "scikit-learn": sklearn.__version__,
        },
        "gmm": gmm_section(),
        "ivector": ivector_section(),
        "lda": lda_section(),
    },
    sys.stdout,
    indent=1,
)
sys.stdout.write("\n")

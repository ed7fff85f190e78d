#!/usr/bin/env python3
"""Reference values for word-confidence calibration and ranking (crate isogloss-confidence).

Writes tests/fixtures/confidence/sklearn_scipy_reference.json:

- temperature: the maximum-likelihood temperature of p = sigmoid(logit(c) / T) is logistic
  regression on the single feature logit(c) without intercept; scikit-learn's
  LogisticRegression(fit_intercept=False, C=np.inf) (no penalty) gives the coefficient 1/T. Cross-checked
  here against scipy.optimize.minimize_scalar on the same negative log-likelihood.
- temperature and shift: the same with an intercept (LogisticRegression(fit_intercept=True)):
  1/T is the coefficient, the shift the intercept.
- ECE and the reliability table: sklearn.calibration.calibration_curve(strategy='uniform',
  n_bins=10) gives each non-empty bin's accuracy (prob_true) and mean confidence (prob_pred);
  the bin counts use the same binning as its source (np.searchsorted on the inner edges, so a
  value on an edge goes to the lower bin). ECE = sum(count / N * |prob_true - prob_pred|).
- Spearman's rank correlation with ties: scipy.stats.spearmanr.

Convention notes: certainties are rounded to float32 first (the decoder stores them as f32) and
clipped to [1e-6, 1 - 1e-6] before the logit, as the crate does. The labels are drawn from
p = sigmoid(logit(c) / 1.7) with a fixed seed, so the fitted T should land near 1.7.
"""
import json
import pathlib

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import expit, logit
from scipy.stats import spearmanr
from sklearn.calibration import calibration_curve
from sklearn.linear_model import LogisticRegression

rng = np.random.default_rng(20261203)
N = 600
certainty = rng.beta(5.0, 1.5, size=N).astype(np.float32).astype(np.float64)
z = logit(np.clip(certainty, 1e-6, 1 - 1e-6))
correct = rng.random(N) < expit(z / 1.7)

model = LogisticRegression(fit_intercept=False, C=np.inf, tol=1e-12, max_iter=10000)
model.fit(z.reshape(-1, 1), correct.astype(int))
theta = float(model.coef_[0, 0])


def nll(t):
    return float(np.sum(np.logaddexp(0, t * z) - correct * t * z))


check = minimize_scalar(nll, bounds=(1e-3, 10), method="bounded", options={"xatol": 1e-12})
assert abs(check.x - theta) < 1e-6 * theta, (check.x, theta)
temperature = 1.0 / theta


def table(p):
    prob_true, prob_pred = calibration_curve(correct, p, n_bins=10, strategy="uniform")
    bins = np.linspace(0.0, 1.0, 11)
    counts = np.bincount(np.searchsorted(bins[1:-1], p), minlength=10)
    nonempty = counts[counts > 0]
    ece = float(np.sum(nonempty / len(p) * np.abs(prob_true - prob_pred)))
    return {
        "counts": counts.tolist(),
        "accuracy": prob_true.tolist(),
        "mean_confidence": prob_pred.tolist(),
        "ece": ece,
    }


raw = table(certainty)
calibrated = table(expit(z / temperature))

# temperature and shift: logistic regression on logit(c) with an intercept
platt_model = LogisticRegression(fit_intercept=True, C=np.inf, tol=1e-12, max_iter=10000)
platt_model.fit(z.reshape(-1, 1), correct.astype(int))
platt_t = 1.0 / float(platt_model.coef_[0, 0])
platt_shift = float(platt_model.intercept_[0])
platt = table(expit(z / platt_t + platt_shift))
platt.update({"temperature": platt_t, "shift": platt_shift})

# rank correlation with ties on both sides
x = np.round(rng.random(40), 1)
y = np.round(x + rng.normal(0, 0.3, 40), 1)
rho = float(spearmanr(x, y).statistic)

out = pathlib.Path(__file__).resolve().parents[2] / "tests/fixtures/confidence/sklearn_scipy_reference.json"
out.parent.mkdir(parents=True, exist_ok=True)
out.write_text(
    json.dumps(
        {
            "certainty": certainty.tolist(),
            "correct": correct.tolist(),
            "temperature": temperature,
            "raw": raw,
            "calibrated": calibrated,
            "platt": platt,
            "spearman": {"x": x.tolist(), "y": y.tolist(), "rho": rho},
        },
        indent=1,
    )
    + "\n"
)
print(f"T = {temperature:.6f}, ECE raw {raw['ece']:.4f}, calibrated {calibrated['ece']:.4f}, rho {rho:.4f}")

#!/usr/bin/env python3
"""Reference bootstrap intervals from scipy.stats.bootstrap for isogloss-score.

Writes tests/fixtures/score/scipy_bootstrap.json. Run with the project's reference venv:

    ../venv/bin/python scripts/reference/bootstrap_reference.py

The data: per-utterance (errors, reference words) of two systems on 150 generated utterances
(seeded numpy generator; lengths 2-24 words, speakers of different difficulty, some insertions;
system 2 makes up to three errors fewer or two more per utterance, slightly fewer on average). The statistic is the corpus error
rate sum(errors) / sum(reference words); utterances are resampled, the same draw for every
array of one utterance (scipy's paired=True), as isogloss does. Recorded from
scipy.stats.bootstrap(method='percentile', n_resamples=REFERENCE_RESAMPLES):

  * the 95 % interval of system 1's rate, and for contrast its 90 % interval;
  * the 95 % interval of the paired difference rate(2) - rate(1), the share of replicates in
    which system 2 is strictly better (from scipy's bootstrap_distribution), and for contrast
    the 95 % interval of the same difference when the two systems are resampled independently
    (paired=False), i.e. what an implementation that forgot the pairing would report.

Monte-Carlo tolerance. isogloss and scipy draw different replicates, so their intervals differ
by chance. A bound at level q estimated from B replicates has standard deviation
sqrt(q (1 - q) / B) / f(x_q), f the density of the bootstrap distribution at its q-quantile
(the asymptotic variance of a sample quantile). Both sides are independent estimates of the
same quantile, so their difference has standard deviation
    sd = sqrt(q (1 - q) (1 / B_isogloss + 1 / B_scipy)) / f(x_q),
and the Rust test accepts a difference below 4 sd (probability of a false alarm about 6e-5 per
bound for a normal difference). f(x_q) is estimated here from scipy's replicates by the
spacing of the quantiles at q +- 0.01: f ~ 0.02 / (x_{q+0.01} - x_{q-0.01}). The bootstrap
distribution of a ratio of integer sums is lumpy, where the asymptotic formula can be
optimistic, so the sd is also measured: REPEATS scipy intervals of B_isogloss replicates each,
with independent seeds; their standard deviation, times sqrt(1 + B_isogloss / B_scipy) for the
reference's own noise, is the measured sd. The tolerance is 4 times the larger of the two. For
the share of better replicates (a proportion p) the binomial variance gives
sd = sqrt(p (1 - p) (1/B + 1/B')). The fixture records B_scipy, the B_isogloss the test must use,
each tolerance and both sds behind it.
"""

import json
import pathlib

import numpy as np
from scipy import stats

OUT = pathlib.Path(__file__).resolve().parents[2] / "tests" / "fixtures" / "score" / "scipy_bootstrap.json"
UTTERANCES = 150
REFERENCE_RESAMPLES = 200_000
ISOGLOSS_RESAMPLES = 20_000
SIGMAS = 4.0
REPEATS = 100


def generated_utterances(rng):
    words = rng.integers(2, 25, size=UTTERANCES)
    difficulty = rng.choice([0.08, 0.15, 0.3], size=UTTERANCES)
    errors1 = rng.binomial(words, difficulty) + rng.binomial(1, 0.1, size=UTTERANCES)
    # system 2: per utterance two to three errors fewer or more, fewer more often
    change = rng.choice([-3, -2, -1, 0, 1, 2], p=[0.08, 0.12, 0.2, 0.25, 0.22, 0.13], size=UTTERANCES)
    errors2 = np.maximum(errors1 + change, 0)
    return words, errors1, errors2


def rate(errors, words, axis=-1):
    return errors.sum(axis=axis) / words.sum(axis=axis)


def difference(errors1, errors2, words, axis=-1):
    return (errors2.sum(axis=axis) - errors1.sum(axis=axis)) / words.sum(axis=axis)


def unpaired_difference(errors1, words1, errors2, words2, axis=-1):
    return rate(errors2, words2, axis) - rate(errors1, words1, axis)


def bootstrap(data, statistic, level, paired=True, seed=0):
    return stats.bootstrap(
        data,
        statistic,
        n_resamples=REFERENCE_RESAMPLES,
        batch=10_000,
        vectorized=True,
        paired=paired,
        confidence_level=level,
        method="percentile",
        rng=np.random.default_rng(seed),
    )


def quantile_sd(replicates, q):
    """Monte-Carlo sd of the isogloss-minus-scipy difference of the q-quantile, by the
    asymptotic formula (docstring)."""
    low, high = np.quantile(replicates, [q - 0.01, q + 0.01])
    density = 0.02 / (high - low)
    return float(np.sqrt(q * (1 - q) * (1 / ISOGLOSS_RESAMPLES + 1 / REFERENCE_RESAMPLES)) / density)


def repeated_sd(data, statistic, level, paired):
    """The same sd measured: the spread of REPEATS intervals of ISOGLOSS_RESAMPLES replicates
    each (independent seeds), widened by the reference's own share of the variance."""
    bounds = np.array([
        [
            float(value)
            for value in stats.bootstrap(
                data,
                statistic,
                n_resamples=ISOGLOSS_RESAMPLES,
                vectorized=True,
                paired=paired,
                confidence_level=level,
                method="percentile",
                rng=np.random.default_rng(1000 + repeat),
            ).confidence_interval
        ]
        for repeat in range(REPEATS)
    ])
    widen = np.sqrt(1 + ISOGLOSS_RESAMPLES / REFERENCE_RESAMPLES)
    return [float(sd) * widen for sd in bounds.std(axis=0, ddof=1)]


def interval_entry(data, statistic, level, seed, paired=True):
    result = bootstrap(data, statistic, level, paired=paired, seed=seed)
    tail = (1 - level) / 2
    replicates = result.bootstrap_distribution
    formula = [quantile_sd(replicates, tail), quantile_sd(replicates, 1 - tail)]
    measured = repeated_sd(data, statistic, level, paired)
    return result, {
        "level": level,
        "low": float(result.confidence_interval.low),
        "high": float(result.confidence_interval.high),
        "sd_formula": formula,
        "sd_measured": measured,
        "tolerance": [SIGMAS * max(f, m) for f, m in zip(formula, measured)],
    }


def main():
    rng = np.random.default_rng(20261217)
    words, errors1, errors2 = generated_utterances(rng)

    _, single = interval_entry((errors1, words), rate, 0.95, seed=1)
    _, single_90 = interval_entry((errors1, words), rate, 0.90, seed=2)
    paired, paired_interval = interval_entry((errors1, errors2, words), difference, 0.95, seed=3)
    better = float(np.mean(paired.bootstrap_distribution < 0))
    better_sd = float(np.sqrt(better * (1 - better) * (1 / ISOGLOSS_RESAMPLES + 1 / REFERENCE_RESAMPLES)))
    _, unpaired = interval_entry(
        (errors1, words, errors2, words), unpaired_difference, 0.95, seed=4, paired=False
    )

    reference = {
        "source": "scipy.stats.bootstrap(method='percentile'), scipy " + __import__("scipy").__version__
        + ", made by scripts/reference/bootstrap_reference.py",
        "reference_resamples": REFERENCE_RESAMPLES,
        "isogloss_resamples": ISOGLOSS_RESAMPLES,
        "sigmas": SIGMAS,
        "utterances": [
            {"ref_words": int(w), "errors1": int(e1), "errors2": int(e2)}
            for w, e1, e2 in zip(words, errors1, errors2)
        ],
        "rate": {"point": float(rate(errors1, words)), "interval": single, "interval_90": single_90},
        "paired": {
            "point": float(difference(errors1, errors2, words)),
            "interval": paired_interval,
            "probability_system2_better": better,
            "probability_sd": better_sd,
            "probability_tolerance": SIGMAS * better_sd,
            "unpaired_interval": unpaired,
        },
    }
    OUT.write_text(json.dumps(reference, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {OUT}")
    print(json.dumps({k: v for k, v in reference.items() if k != "utterances"}, indent=1))


if __name__ == "__main__":
    main()

#!/usr/bin/env python3
"""Reference quantiles for the self-training pool check (crate isogloss-confidence).

Writes tests/fixtures/confidence/numpy_quantiles.json: for a few lists of segment confidences
(sizes 1, 2, 7 and 86 — dev's size on the demo; drawn with a fixed seed, unsorted), numpy's
np.quantile(x, q) with its default method ("linear": position (n - 1) q, linear interpolation
between the two nearest ranks; Hyndman and Fan's definition 7) at q = 0.25 and 0.5.

Run: python3 scripts/reference/quantile_reference.py (numpy).
"""
import json
import pathlib

import numpy as np

rng = np.random.default_rng(18)
cases = [[0.3], [0.5, 0.8], [0.91, 0.42, 0.77, 0.99, 0.63, 0.88, 0.70]]
cases.append([round(float(v), 6) for v in rng.beta(8.0, 1.2, size=86)])
out = {
    "source": f"numpy {np.__version__}, np.quantile(x, q), default method 'linear'",
    "cases": [
        {"x": x, "q25": float(np.quantile(x, 0.25)), "q50": float(np.quantile(x, 0.5))}
        for x in cases
    ],
}
path = pathlib.Path(__file__).resolve().parents[2] / "tests/fixtures/confidence/numpy_quantiles.json"
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path}")

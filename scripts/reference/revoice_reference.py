#!/usr/bin/env python3
"""Reference values for the linear prediction of the re-voicing step of isogloss-audio
(crates/audio/src/augment/revoice.rs).

Computed with numpy and scipy, independently of the Rust code:

  frame        a 25 ms frame (400 samples at 16 kHz) of a fixed test signal (a 120 Hz pulse
               train through two resonances plus a tone and seeded noise, written below),
               pre-emphasised with 1 - 0.97 z^-1 and multiplied by the periodic Hann window
               scipy.signal.get_window("hann", 400).
  r            numpy.correlate(frame, frame, "full") at lags 0 to 18.
  polynomial   [1, a_1 .. a_18] with a = scipy.linalg.solve_toeplitz(r[:18], -r[1:19]), the
               normal equations of the autocorrelation method of linear prediction.
  error        r[0] + sum(a_k r[k]), the prediction error power.

Three frames: the one above, the same with a white-noise correction of 1e-4 on r[0], and a
frame of seeded white noise alone.

Writes tests/fixtures/audio/revoice_reference.json.

Run: ../venv/bin/python scripts/reference/revoice_reference.py
"""

import json
import pathlib

import numpy as np
import scipy.linalg
import scipy.signal

ROOT = pathlib.Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "audio" / "revoice_reference.json"
FS = 16000
ORDER = 18
WINDOW = 400


def voiced():
    n = np.arange(WINDOW + 1)
    source = np.where(n % round(FS / 120) == 0, 1.0, 0.0)
    y = source.copy()
    for f, bw in [(650.0, 90.0), (1700.0, 120.0)]:
        r = np.exp(-np.pi * bw / FS)
        theta = 2 * np.pi * f / FS
        y = scipy.signal.lfilter([1.0], [1.0, -2 * r * np.cos(theta), r * r], y)
    y += 0.05 * np.sin(2 * np.pi * 2500.0 * n / FS)
    y += 0.01 * np.random.default_rng(7).standard_normal(len(n))
    return y


def noise():
    return 0.1 * np.random.default_rng(11).standard_normal(WINDOW + 1)


def case(name, x, correction):
    emphasised = x[1:] - 0.97 * x[:-1]
    frame = emphasised * scipy.signal.get_window("hann", WINDOW)
    full = np.correlate(frame, frame, "full")
    r = full[WINDOW - 1 : WINDOW + ORDER]
    solved_r = r.copy()
    solved_r[0] *= 1.0 + correction
    a = scipy.linalg.solve_toeplitz(solved_r[:ORDER], -solved_r[1 : ORDER + 1])
    error = solved_r[0] + np.dot(a, solved_r[1 : ORDER + 1])
    return {
        "name": name,
        "frame": frame.tolist(),
        "r": r.tolist(),
        "correction": correction,
        "polynomial": [1.0] + a.tolist(),
        "error": float(error),
    }


def main():
    cases = [
        case("voiced", voiced(), 0.0),
        case("voiced, white-noise correction", voiced(), 1e-4),
        case("white noise", noise(), 0.0),
    ]
    OUT.write_text(
        json.dumps(
            {
                "source": "numpy.correlate and scipy.linalg.solve_toeplitz "
                + f"(numpy {np.__version__}, scipy {scipy.__version__}); "
                + "scripts/reference/revoice_reference.py",
                "order": ORDER,
                "cases": cases,
            },
            indent=1,
        )
        + "\n"
    )


if __name__ == "__main__":
    main()

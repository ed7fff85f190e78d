#!/usr/bin/env python3
"""Reference values for the simulated codec of isogloss-audio (crates/audio/src/augment/codec.rs).

Computed with scipy, independently of the Rust code:

  window    the square root of scipy.signal.get_window("hann", 512) (periodic, the default
            fftbins=True), the codec's analysis and synthesis window.
  spectra   scipy.signal.stft(x, fs=16000, window=that window, nperseg=512, noverlap=256,
            boundary=None, padded=False, return_onesided=True) of a fixed test signal (a chirp
            with two tones, written below as a formula). scipy scales the spectrum by
            1/sum(window) (its default scaling="spectrum"); the values are multiplied back so
            that they are the unnormalised DFT of each windowed frame, the Rust convention.

Writes tests/fixtures/audio/codec_reference.json.

Run: ../venv/bin/python scripts/reference/codec_reference.py
"""

import json
import pathlib

import numpy as np
import scipy
import scipy.signal

ROOT = pathlib.Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "audio" / "codec_reference.json"
FS = 16000
FRAME = 512
HOP = 256
LENGTH = 2000  # 6 whole frames


def signal():
    n = np.arange(LENGTH, dtype=np.float64)
    t = n / FS
    chirp = 0.4 * np.sin(2 * np.pi * (200.0 * t + 0.5 * 30000.0 * t * t))
    tones = 0.2 * np.sin(2 * np.pi * 1000.0 * t) + 0.05 * np.cos(2 * np.pi * 5500.0 * t + 0.3)
    return (chirp + tones).astype(np.float32)


def main():
    window = np.sqrt(scipy.signal.get_window("hann", FRAME))
    x = signal()
    _, _, z = scipy.signal.stft(
        x.astype(np.float64), fs=FS, window=window, nperseg=FRAME, noverlap=FRAME - HOP,
        boundary=None, padded=False, return_onesided=True)
    z = z * window.sum()  # undo scipy's 1/sum(window) scaling
    spectra = z.T  # frames × bins
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps({
        "source": f"scipy {scipy.__version__}, numpy {np.__version__}",
        "frame": FRAME,
        "hop": HOP,
        "window": window.tolist(),
        "signal": [float(v) for v in x],
        "spectra_re": spectra.real.tolist(),
        "spectra_im": spectra.imag.tolist(),
    }, indent=None))
    print(f"wrote {OUT}: {spectra.shape[0]} frames × {spectra.shape[1]} bins")


if __name__ == "__main__":
    main()

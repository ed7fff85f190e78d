#!/usr/bin/env python3
"""Reference MFCC + delta + delta-delta and log-mel values for isogloss-features.

Computed independently of the Rust code with numpy/scipy and librosa's HTK-formula mel filterbank,
following the default front end of docs/features.md:

  int16 / 32768 -> pre-emphasis y[0]=x[0], y[n]=x[n]-0.97 x[n-1] -> 400-sample frames every 160
  samples, no padding -> symmetric Hamming -> 512-point FFT power spectrum -> 40 HTK mel triangles
  20-8000 Hz, peak 1, no area normalisation (librosa.filters.mel(htk=True, norm=None)) -> natural
  log floored at 1e-10 -> orthonormal DCT-II (scipy.fft.dct(norm="ortho")) c0..c12 -> deltas by
  regression over +-2 frames, edge frames replicated (librosa.feature.delta(mode="nearest"),
  cross-checked against the regression formula written out in numpy) -> [c, d, dd] = 39 dims.
  The log-mel reference is the same pipeline stopped before the DCT (40 dims, no deltas).

The audio is real speech-like audio synthesised with espeak-ng and resampled to 16 kHz 16-bit mono
with sox (`--synthesize` regenerates it; by default the committed WAV is used).

Writes (next to the WAV, under tests/fixtures/features/):
  speech.wav                    the input audio
  reference-mfcc.safetensors    f32 tensor `features` [frames, 39]  (written by the safetensors
  reference-logmel.safetensors   f32 tensor `features` [frames, 40]   Python package, not by us)
  reference.json                provenance: library versions, settings, shapes, librosa's HTK mel scale

Run: ../venv/bin/python scripts/reference/features_reference.py [--synthesize]
"""

import argparse
import json
import pathlib
import subprocess
import tempfile

import librosa
import numpy as np
import scipy
import scipy.fft
import soundfile
from safetensors.numpy import save_file

ROOT = pathlib.Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "tests" / "fixtures" / "features"
WAV = FIXTURES / "speech.wav"
SENTENCE = "The ferry leaves the harbour at seven."

SAMPLE_RATE = 16000
PREEMPHASIS = 0.97
FRAME_LENGTH = 400
FRAME_SHIFT = 160
FFT_SIZE = 512
MEL_BINS = 40
LOW_HZ = 20.0
HIGH_HZ = 8000.0
LOG_FLOOR = 1e-10
CEPSTRA = 13
DELTA_WINDOW = 2


def synthesize(path: pathlib.Path) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        raw = pathlib.Path(tmp) / "espeak.wav"
        subprocess.run(["espeak-ng", "-v", "en", "-s", "160", "-w", str(raw), SENTENCE], check=True)
        # -D: no dither, so the resampled file is reproducible.
        subprocess.run(["sox", "-D", str(raw), "-r", "16000", "-b", "16", "-c", "1", str(path)], check=True)


def regression_deltas(features: np.ndarray, window: int) -> np.ndarray:
    """d_t = sum_n n (c_{t+n} - c_{t-n}) / (2 sum_n n^2), edges replicated (written out by hand)."""
    padded = np.pad(features, ((window, window), (0, 0)), mode="edge")
    frames = features.shape[0]
    numerator = np.zeros_like(features)
    for n in range(1, window + 1):
        numerator += n * (padded[window + n : window + n + frames] - padded[window - n : window - n + frames])
    return numerator / (2.0 * sum(n * n for n in range(1, window + 1)))


def librosa_deltas(features: np.ndarray, window: int) -> np.ndarray:
    # A first-order Savitzky-Golay derivative over 2*window+1 points is the regression formula.
    return librosa.feature.delta(features, width=2 * window + 1, order=1, axis=0, mode="nearest")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--synthesize", action="store_true", help="regenerate speech.wav with espeak-ng and sox")
    args = parser.parse_args()
    FIXTURES.mkdir(parents=True, exist_ok=True)
    if args.synthesize or not WAV.exists():
        synthesize(WAV)

    pcm, rate = soundfile.read(WAV, dtype="int16")
    assert rate == SAMPLE_RATE and pcm.ndim == 1, (rate, pcm.shape)
    x = pcm.astype(np.float64) / 32768.0

    y = np.empty_like(x)
    y[0] = x[0]
    y[1:] = x[1:] - PREEMPHASIS * x[:-1]

    frames = 1 + (len(y) - FRAME_LENGTH) // FRAME_SHIFT
    index = np.arange(FRAME_LENGTH)[None, :] + FRAME_SHIFT * np.arange(frames)[:, None]
    window = np.hamming(FRAME_LENGTH)  # numpy's Hamming is the symmetric one: 0.54 - 0.46 cos(2 pi n / (N-1))
    spectrum = np.fft.rfft(y[index] * window, n=FFT_SIZE, axis=1)
    power = spectrum.real**2 + spectrum.imag**2

    mel = librosa.filters.mel(
        sr=SAMPLE_RATE, n_fft=FFT_SIZE, n_mels=MEL_BINS, fmin=LOW_HZ, fmax=HIGH_HZ, htk=True, norm=None, dtype=np.float64
    )
    logmel = np.log(np.maximum(power @ mel.T, LOG_FLOOR))
    cepstra = scipy.fft.dct(logmel, type=2, norm="ortho", axis=1)[:, :CEPSTRA]

    delta = librosa_deltas(cepstra, DELTA_WINDOW)
    delta_delta = librosa_deltas(delta, DELTA_WINDOW)
    # librosa's delta and the regression formula written out must agree, or one of them is misread.
    assert np.allclose(delta, regression_deltas(cepstra, DELTA_WINDOW), atol=1e-9)
    assert np.allclose(delta_delta, regression_deltas(delta, DELTA_WINDOW), atol=1e-9)
    mfcc = np.concatenate([cepstra, delta, delta_delta], axis=1)

    save_file({"features": mfcc.astype(np.float32)}, str(FIXTURES / "reference-mfcc.safetensors"))
    save_file({"features": logmel.astype(np.float32)}, str(FIXTURES / "reference-logmel.safetensors"))
    provenance = {
        "generator": "scripts/reference/features_reference.py",
        "audio": {"file": WAV.name, "samples": int(len(pcm)), "sample_rate": SAMPLE_RATE,
                  "made_with": f"espeak-ng -v en -s 160 '{SENTENCE}' | sox -D -r 16000 -b 16 -c 1"},
        "libraries": {"numpy": np.__version__, "scipy": scipy.__version__, "librosa": librosa.__version__},
        "settings": {"emphasis": PREEMPHASIS, "window_samples": FRAME_LENGTH, "hop_samples": FRAME_SHIFT,
                     "fft_size": FFT_SIZE, "mel_filters": MEL_BINS, "band_low_hz": LOW_HZ,
                     "band_high_hz": HIGH_HZ, "log_floor": LOG_FLOOR, "cepstra": CEPSTRA,
                     "slope_reach": DELTA_WINDOW},
        "mfcc_shape": list(mfcc.shape),
        "logmel_shape": list(logmel.shape),
        # librosa.hz_to_mel(htk=True) is 2595 log10(1 + f/700) (O'Shaughnessy); 1000 Hz maps to ~1000 mel.
        "hz_to_mel_htk": {str(f): float(librosa.hz_to_mel(f, htk=True)) for f in (20.0, 1000.0, 8000.0)},
    }
    (FIXTURES / "reference.json").write_text(json.dumps(provenance, indent=1) + "\n")
    print(f"{frames} frames; mfcc {mfcc.shape}, logmel {logmel.shape} -> {FIXTURES}")


if __name__ == "__main__":
    main()

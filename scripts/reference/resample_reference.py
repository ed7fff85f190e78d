#!/usr/bin/env python3
"""Reference 16 kHz resampling of tests/fixtures/audio/speech.wav (22.05 kHz espeak-ng speech) by
scipy.signal.resample_poly (polyphase FIR, Kaiser window), for crates/audio/tests/containers.rs.

Writes tests/fixtures/audio/resample_reference.json: the output length, the RMS of every
10 ms frame (160 samples) and an 800-sample excerpt from the middle of the utterance.
Run: ../venv/bin/python scripts/reference/resample_reference.py
"""
import json
from math import gcd
from pathlib import Path

import numpy as np
import scipy
import scipy.signal
import soundfile

root = Path(__file__).resolve().parents[2]
audio = root / "tests/fixtures/audio/speech.wav"
samples, rate = soundfile.read(audio, dtype="int16")
x = samples.astype(np.float64) / 32768.0  # docs/features.md: int16 scaled by 1/32768
g = gcd(16000, rate)
y = scipy.signal.resample_poly(x, 16000 // g, rate // g)
frames = len(y) // 160
frame_rms = np.sqrt((y[: frames * 160].reshape(frames, 160) ** 2).mean(axis=1))
start = len(y) // 2 - 400
out = {
    "source": f"scipy.signal.resample_poly (scipy {scipy.__version__}) of speech.wav, {rate} Hz -> 16000 Hz",
    "input_rate": rate,
    "input_frames": len(x),
    "output_length": len(y),
    "frame_rms": [round(float(v), 7) for v in frame_rms],
    "excerpt_start": start,
    "excerpt": [round(float(v), 7) for v in y[start : start + 800]],
}
path = root / "tests/fixtures/audio/resample_reference.json"
path.write_text(json.dumps(out, indent=0) + "\n")
print(path, len(y), "samples")

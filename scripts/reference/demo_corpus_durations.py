#!/usr/bin/env python3
"""Decode every audio file of the demo corpus with libsndfile (through the `soundfile` package, a
reference decoder this project did not write) and compare the decoded length, sample rate and
channel count with `durations.tsv`, which the generator took from the uncompressed 16 kHz WAV
before Ogg Vorbis encoding.

    /work/venv/bin/python scripts/reference/demo_corpus_durations.py [tests/data/demo]

Prints one line per mismatch and a summary; exit code 1 when anything differs.
"""

import os
import sys

import soundfile

folder = sys.argv[1] if len(sys.argv) > 1 else "tests/data/demo"
bad = 0
checked = 0
with open(os.path.join(folder, "durations.tsv"), encoding="utf-8") as f:
    header = f.readline().rstrip("\n").split("\t")
    for line_no, line in enumerate(f, start=2):
        fields = dict(zip(header, line.rstrip("\n").split("\t")))
        path = os.path.join(folder, fields["audio"])
        data, rate = soundfile.read(path, dtype="int16", always_2d=True)
        checked += 1
        if rate != 16000 or data.shape[1] != 1 or data.shape[0] != int(fields["samples"]):
            bad += 1
            print(f"durations.tsv line {line_no}: {fields['audio']}: expected 16000 Hz, 1 channel, "
                  f"{fields['samples']} samples; decoded {rate} Hz, {data.shape[1]} channel(s), "
                  f"{data.shape[0]} samples")
print(f"{checked} files decoded, {bad} mismatches")
sys.exit(1 if bad else 0)

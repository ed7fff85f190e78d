#!/usr/bin/env python3
"""Reference values for the augmentations of isogloss-audio (crates/audio/src/augment).

Computed with general-purpose libraries, independently of the Rust code:

  rooms         pyroomacoustics.ShoeBox room impulse responses by the image-source method on
                fixed rooms: one source, one microphone, every wall with the same energy
                absorption (pyroomacoustics.Material(a)), a fixed maximum reflection order,
                fs = 16 kHz, c = 343 m/s, the package's 81-tap windowed-sinc fractional delay,
                air_absorption=False, use_rand_ism=False, and the package's default 10 Hz
                high-pass on responses turned off (constants "rir_hpf_enable" = False), so that
                what is compared is the image-source response itself.
  sabine        pyroomacoustics.inverse_sabine(rt60, room): the energy absorption of Sabine's
                formula (and the reflection order the package would pick).
  butterworth   scipy.signal.butter(4, cut, btype, fs=16000, output="sos") magnitude responses
                (scipy.signal.sosfreqz), squared because the Rust filter runs forward and
                backward.

Writes tests/fixtures/audio/augment_reference.json.

Run: ../venv/bin/python scripts/reference/augment_reference.py
"""

import json
import pathlib

import numpy as np
import pyroomacoustics as pra
import scipy
import scipy.signal

ROOT = pathlib.Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "audio" / "augment_reference.json"
FS = 16000

ROOMS = [
    # dimensions (m), source, microphone, energy absorption, maximum reflection order
    ([5.0, 4.0, 3.0], [1.0, 1.0, 1.5], [3.0, 2.5, 1.2], 0.3, 10),
    ([8.3, 6.1, 3.4], [2.2, 4.7, 1.6], [6.05, 1.33, 1.1], 0.15, 12),
    ([3.2, 2.9, 2.5], [0.7, 2.1, 1.7], [2.4, 0.9, 1.2], 0.6, 17),
]

SABINE = [
    # RT60 (s), room dimensions (m)
    (0.3, [5.0, 4.0, 3.0]),
    (0.5, [8.3, 6.1, 3.4]),
    (0.8, [10.0, 8.0, 4.0]),
    (0.2, [3.0, 3.0, 2.4]),
]

BANDS = [
    # btype, cut-off (Hz)
    ("highpass", 300.0),
    ("lowpass", 3400.0),
    ("highpass", 50.0),
    ("lowpass", 7500.0),
]
FREQUENCIES = [20.0, 50.0, 100.0, 150.0, 300.0, 450.0, 1000.0, 2000.0, 3000.0, 3400.0, 4000.0, 6000.0, 7500.0, 7900.0]


def room_response(dimensions, source, microphone, absorption, max_order):
    pra.constants.set("rir_hpf_enable", False)
    room = pra.ShoeBox(
        dimensions,
        fs=FS,
        materials=pra.Material(absorption),
        max_order=max_order,
        air_absorption=False,
        use_rand_ism=False,
    )
    room.add_source(source)
    room.add_microphone(microphone)
    room.compute_rir()
    assert room.c == 343.0
    return room.rir[0][0]


def main():
    rooms = []
    for dimensions, source, microphone, absorption, max_order in ROOMS:
        rir = room_response(dimensions, source, microphone, absorption, max_order)
        rooms.append(
            {
                "dimensions_m": dimensions,
                "source_m": source,
                "microphone_m": microphone,
                "absorption": absorption,
                "max_order": max_order,
                "fractional_delay_taps": pra.constants.get("frac_delay_length"),
                "speed_of_sound": 343.0,
                "sample_rate": FS,
                "rir": [float(f"{v:.9g}") for v in rir],  # float32 values, exact in 9 digits
            }
        )
    sabine = []
    for rt60, dimensions in SABINE:
        absorption, max_order = pra.inverse_sabine(rt60, dimensions, c=343.0)
        sabine.append(
            {"rt60_seconds": rt60, "dimensions_m": dimensions, "absorption": float(absorption), "max_order": int(max_order)}
        )
    butterworth = []
    for btype, cut in BANDS:
        sos = scipy.signal.butter(4, cut, btype=btype, fs=FS, output="sos")
        _, response = scipy.signal.sosfreqz(sos, worN=np.array(FREQUENCIES), fs=FS)
        butterworth.append(
            {
                "type": btype,
                "cut_hz": cut,
                "frequencies_hz": FREQUENCIES,
                "forward_backward_gain": [float(abs(h) ** 2) for h in response],
            }
        )
    OUT.write_text(
        json.dumps(
            {
                "provenance": {
                    "script": "scripts/reference/augment_reference.py",
                    "pyroomacoustics": pra.__version__,
                    "scipy": scipy.__version__,
                    "numpy": np.__version__,
                },
                "rooms": rooms,
                "sabine": sabine,
                "butterworth": butterworth,
            },
            indent=1,
        )
        + "\n"
    )
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()

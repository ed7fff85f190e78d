#!/usr/bin/env python3
"""Reference f32 -> bfloat16 rounding of torch for isogloss-acoustic's bf16 matrix products.

Writes crates/acoustic/tests/fixtures/bf16_rounding_torch.json. Run with the project's reference
venv:

    ../venv/bin/python scripts/reference/bf16_rounding.py

For a set of float32 bit patterns (exact values: ones, ties to even with an even and an odd
kept half, values just above and below a tie, the largest finite values that round to
infinity or stay finite, infinities, NaN, zeros, subnormals with ties, and random patterns),
records the bit pattern of torch.tensor(x, dtype=torch.float32).to(torch.bfloat16). torch
rounds to nearest, ties to even, on the bit pattern (bfloat16 is the upper 16 bits of binary32)
and keeps subnormals. A NaN comes out as some NaN pattern (0xFFFF with torch 2.15, not the
0x7FC0 of its scalar conversion), so the test only asks that a NaN stays a NaN.
"""

import json
import pathlib

import numpy as np
import torch

OUT = pathlib.Path(__file__).resolve().parents[2] / "crates/acoustic/tests/fixtures/bf16_rounding_torch.json"

FIXED = [
    0x3F800000,  # 1.0
    0xBF800000,  # -1.0
    0x3F808000,  # 1 + 2^-8: a tie, kept half even -> down
    0x3F818000,  # a tie, kept half odd -> up
    0x3F808001,  # just above a tie -> up
    0x3F807FFF,  # just below a tie -> down
    0xBF818000,  # negative tie, odd -> away from zero
    0x7F7FFFFF,  # largest finite float32 -> rounds to infinity
    0x7F7F7FFF,  # largest value that stays finite
    0x7F7F8000,  # tie at the top, kept half odd -> infinity
    0x7F800000,  # +inf
    0xFF800000,  # -inf
    0x7FC00000,  # quiet NaN
    0x00000000,  # +0
    0x80000000,  # -0
    0x00000001,  # smallest subnormal -> 0
    0x00008000,  # subnormal tie, even -> 0
    0x00018000,  # subnormal tie, odd -> up
    0x00400000,  # subnormal, exact in bfloat16
    0x807FFFFF,  # largest negative subnormal -> rounds up to the smallest normal
    0x00800000,  # smallest normal
    0x4B800000,  # 2^24
    0x3DCCCCCD,  # 0.1
    0x42F6E979,  # 123.456
    0x501502F9,  # 1e10
]


def main():
    generator = np.random.default_rng(20261204)
    random = generator.integers(0, 2**32, size=200, dtype=np.uint64)
    # Finite patterns only among the random ones (NaN payloads are covered by the fixed one).
    random = [int(b) for b in random if (int(b) >> 23) & 0xFF != 0xFF]
    patterns = FIXED + random
    values = torch.tensor(np.array(patterns, dtype=np.uint32).view(np.float32), dtype=torch.float32)
    rounded = values.to(torch.bfloat16).view(torch.int16).numpy().view(np.uint16)
    reference = {
        "source": f"torch.Tensor.to(torch.bfloat16), torch {torch.__version__}, made by scripts/reference/bf16_rounding.py",
        "cases": [[p, int(r)] for p, r in zip(patterns, rounded)],
    }
    OUT.write_text(json.dumps(reference) + "\n", encoding="utf-8")
    print(f"wrote {OUT} ({len(patterns)} patterns)")


if __name__ == "__main__":
    main()

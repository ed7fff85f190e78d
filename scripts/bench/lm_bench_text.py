#!/usr/bin/env python3
"""Seeded benchmark text for isogloss-lm: Zipfian vocabulary, Markov word choice.

Each word has its own short list of preferred successors (so that n-grams repeat as in real
text); with probability 0.35 the next word is instead drawn from the global Zipf distribution.
Sentence lengths are 3..30 words.

    python3 scripts/bench/lm_bench_text.py --tokens 10000000 --out /tmp/bench.txt
"""
import argparse

import numpy as np


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--tokens", type=int, default=10_000_000)
    parser.add_argument("--vocabulary", type=int, default=50_000)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--out", required=True)
    args = parser.parse_args()
    random = np.random.default_rng(args.seed)
    size = args.vocabulary
    ranks = np.arange(1, size + 1, dtype=np.float64)
    zipf = 1.0 / ranks
    zipf /= zipf.sum()
    successors = random.choice(size, size=(size, 16), p=zipf)
    successor_weights = 1.0 / np.arange(1, 17)
    successor_weights /= successor_weights.sum()
    words = np.array([f"w{i}" for i in range(size)])
    written = 0
    with open(args.out, "w", encoding="utf-8") as out:
        while written < args.tokens:
            batch = 10_000
            lengths = random.integers(3, 31, size=batch)
            total = int(lengths.sum())
            global_draws = random.choice(size, size=total, p=zipf)
            local_choice = random.choice(16, size=total, p=successor_weights)
            use_global = random.random(total) < 0.35
            position = 0
            lines = []
            for length in lengths:
                sentence = np.empty(length, dtype=np.int64)
                previous = global_draws[position]
                sentence[0] = previous
                for i in range(1, length):
                    j = position + i
                    previous = global_draws[j] if use_global[j] else successors[previous, local_choice[j]]
                    sentence[i] = previous
                position += length
                lines.append(" ".join(words[sentence]))
                written += int(length)
                if written >= args.tokens:
                    break
            out.write("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()

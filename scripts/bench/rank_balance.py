#!/usr/bin/env python3
"""How evenly data-parallel ranks share the work of each batch (a simulation, no training).

isogloss gives each rank a fixed share of the training manifest (sorted by length, dealt in a
serpentine: `collective::balanced_share`) and cuts the same length-bucketed batches a single
process would (`train::bucketed_batches`: sorted by length, random tie order, filled until the
padded frames would pass `batch_frames`). Each rank trains on its own utterances of a batch,
padded to its longest, and every update waits for the slowest rank. This script replays that
on a manifest, with a random speed factor (0.9, 1.0, 1.1) per utterance as the default
augmentation draws, and prints the compute efficiency of N ranks: the single process's padded
frames per batch / N, over the slowest rank's padded frames, summed over three epochs' batches.

usage: rank_balance.py MANIFEST [RANKS...]   (needs the `soundfile` package for the lengths)
"""
import csv
import os
import random
import sys

import soundfile


def lengths(manifest):
    root = os.path.dirname(os.path.abspath(manifest))
    with open(manifest, newline="") as f:
        rows = list(csv.reader(f, delimiter="\t"))[1:]
    frames = []
    for row in rows:
        info = soundfile.info(os.path.join(root, row[1]))
        frames.append(info.frames * 100 // info.samplerate)  # 10 ms frames
    return frames


def owners(frames, ranks):
    order = sorted(range(len(frames)), key=lambda i: (-frames[i], i))
    owner = {}
    for k, i in enumerate(order):
        lap, seat = divmod(k, ranks)
        owner[i] = seat if lap % 2 == 0 else ranks - 1 - seat
    return owner


def efficiency(frames, ranks, batch_frames, epochs=3):
    owner = owners(frames, ranks)
    single = slowest = 0
    for epoch in range(epochs):
        rng = random.Random(epoch)
        order = sorted((f, rng.random(), i) for i, f in enumerate(frames))
        batches, current = [], []
        for f, _, i in order:
            if current and (len(current) + 1) * f > batch_frames:
                batches.append(current)
                current = []
            current.append(i)
        batches.append(current)
        for batch in batches:
            perturbed = {i: int(frames[i] * rng.choice([0.9, 1.0, 1.1])) for i in batch}
            single += len(batch) * max(perturbed.values())
            costs = []
            for r in range(ranks):
                mine = [perturbed[i] for i in batch if owner[i] == r]
                costs.append(len(mine) * max(mine, default=0))
            slowest += max(costs)
    return single / ranks / slowest


def main():
    manifest = sys.argv[1]
    ranks = [int(a) for a in sys.argv[2:]] or [2, 4, 8, 16]
    frames = lengths(manifest)
    print("ranks  batch_frames  efficiency")
    for n in ranks:
        for batch_frames in (5000, 5000 * n):
            print(f"{n:>5}  {batch_frames:>12}  {efficiency(frames, n, batch_frames):.3f}")


if __name__ == "__main__":
    main()

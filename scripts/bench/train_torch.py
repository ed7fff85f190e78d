"""The plain PyTorch baseline a user would write instead of `isogloss train` (benchmark, not a test).

Trains a TDNN of 1-D convolutions with batch norm by CTC on the graphemes of a manifest's
transcript column for a fixed wall-clock budget, then decodes a test manifest greedily and writes
the hypotheses as `id<TAB>text`, to be scored by `isogloss score` exactly like isogloss's own.

Recipe (deliberately the obvious one, nothing tuned): 39-dim MFCC (librosa, 25 ms / 10 ms,
40 mel filters, 13 cepstra + Δ + ΔΔ) with per-utterance mean and variance normalisation; six
convolutions (kernel 5, then 3 with stride 3, 3, 3, 3, 1) of `--width` channels, each followed by
batch norm and ReLU; a linear output over blank + graphemes; AdamW at a constant 2e-3; batches of
16 utterances of similar length (sorted, cut, batch order shuffled every epoch); no perturbation.

Features are computed before the clock starts; the budget counts the training loop only (the dev
pass at the end of each epoch included, as a user would run one). Prints JSON lines per epoch and
a summary line with frames/s and frames/s per parameter.

Run: /work/venv/bin/python scripts/bench/train_torch.py --train TRAIN.tsv --test TEST.tsv \
        --column dialectal --minutes 6 --threads 2 --hyp hyp-torch.tsv
"""

import argparse
import csv
import json
import math
import pathlib
import random
import time

import librosa
import numpy as np
import soundfile
import torch

SAMPLE_RATE = 16000


def read_manifest(path):
    path = pathlib.Path(path)
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f, delimiter="\t", quoting=csv.QUOTE_NONE))
    for row in rows:
        row["audio"] = str(path.parent / row["audio"])
    return rows


def load_audio(row):
    samples, rate = soundfile.read(row["audio"], dtype="float32", always_2d=True)
    samples = samples.mean(axis=1)
    if rate != SAMPLE_RATE:
        samples = librosa.resample(samples, orig_sr=rate, target_sr=SAMPLE_RATE)
    start = float(row["start"]) if row.get("start") else 0.0
    end = float(row["end"]) if row.get("end") else None
    first = int(round(start * SAMPLE_RATE))
    last = int(round(end * SAMPLE_RATE)) if end is not None else len(samples)
    return samples[first:last]


def mfcc(samples):
    static = librosa.feature.mfcc(
        y=samples, sr=SAMPLE_RATE, n_mfcc=13, n_fft=512, win_length=400, hop_length=160,
        n_mels=40, fmin=20, fmax=8000, htk=True, center=False, window="hamming",
    )
    width = min(9, static.shape[1] - (1 - static.shape[1] % 2))
    if width < 3:
        d1 = np.zeros_like(static)
        d2 = np.zeros_like(static)
    else:
        d1 = librosa.feature.delta(static, order=1, width=width, mode="nearest")
        d2 = librosa.feature.delta(static, order=2, width=width, mode="nearest")
    features = np.concatenate([static, d1, d2]).T.astype(np.float32)
    features -= features.mean(axis=0)
    features /= features.std(axis=0) + 1e-5
    return features


class ChannelLayerNorm(torch.nn.Module):
    def __init__(self, dims):
        super().__init__()
        self.norm = torch.nn.LayerNorm(dims)

    def forward(self, x):  # [B, C, T]
        return self.norm(x.transpose(1, 2)).transpose(1, 2)


class Tdnn(torch.nn.Module):
    def __init__(self, input_dims, width, units, norm="batch", first_stride=False, dropout=0.0,
                 depth=6):
        super().__init__()
        specs = [(5, 1), (3, 3)] + [(3, 1)] * (depth - 3) + [(1, 1)]
        if first_stride:
            specs = [(5, 3), (3, 1)] + specs[2:]
        layers, dims = [], input_dims
        for kernel, stride in specs:
            conv = torch.nn.Conv1d(dims, width, kernel, stride=stride, padding=kernel // 2)
            if norm == "batch":  # the order a user would write: convolution, batch norm, ReLU
                layers += [conv, torch.nn.BatchNorm1d(width), torch.nn.ReLU()]
            elif norm == "batch-post":
                layers += [conv, torch.nn.ReLU(), torch.nn.BatchNorm1d(width)]
            elif norm == "layer-pre":
                layers += [conv, ChannelLayerNorm(width), torch.nn.ReLU()]
            elif norm == "none":
                layers += [conv, torch.nn.ReLU()]
            else:  # isogloss's order: affine, ReLU, layer norm
                layers += [conv, torch.nn.ReLU(), ChannelLayerNorm(width)]
            if dropout > 0:
                layers.append(torch.nn.Dropout(dropout))
            dims = width
        self.first_stride = first_stride
        self.body = torch.nn.Sequential(*layers)
        self.output = torch.nn.Linear(width, units)

    def forward(self, x):  # [B, T, D] -> [B, T', U]
        return self.output(self.body(x.transpose(1, 2)).transpose(1, 2))

    def output_frames(self, frames):
        # padding k//2 keeps length for stride 1; stride 3 with k=3, pad 1 (or k=5, pad 2)
        # gives ceil(T/3)
        return (frames - 1) // 3 + 1


def batches_of(lengths, size, rng):
    order = sorted(range(len(lengths)), key=lambda i: (lengths[i], rng.random()))
    batches = [order[i:i + size] for i in range(0, len(order), size)]
    rng.shuffle(batches)
    return batches


def pad(features, indices):
    longest = max(features[i].shape[0] for i in indices)
    batch = np.zeros((len(indices), longest, features[indices[0]].shape[1]), np.float32)
    for k, i in enumerate(indices):
        batch[k, : features[i].shape[0]] = features[i]
    return torch.from_numpy(batch)


def greedy(log_probs, frames, units):
    best = log_probs[:frames].argmax(-1).tolist()
    out, previous = [], 0
    for unit in best:
        if unit != previous and unit != 0:
            out.append(units[unit])
        previous = unit
    return " ".join("".join(out).split())


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--train", required=True)
    parser.add_argument("--dev")
    parser.add_argument("--test", action="append", required=True, help="repeatable")
    parser.add_argument("--hyp", action="append", required=True, help="one per --test")
    parser.add_argument("--column", default="dialectal")
    parser.add_argument("--minutes", type=float, default=6.0)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--width", type=int, default=270)
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--lr", type=float, default=2e-3)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--epochs", type=int, help="train this many epochs instead of --minutes")
    parser.add_argument("--norm", choices=["batch", "batch-post", "layer", "layer-pre", "none"], default="batch")
    parser.add_argument("--first-stride", action="store_true", help="subsample in the first layer")
    parser.add_argument("--dropout", type=float, default=0.0)
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--schedule", choices=["constant", "cosine"], default="constant")
    parser.add_argument("--warmup", type=float, default=0.05, help="share of steps (cosine)")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(args.seed)
    rng = random.Random(args.seed)

    prepare_start = time.perf_counter()
    train_rows = read_manifest(args.train)
    texts = [row[args.column] for row in train_rows]
    units = ["<blank>"] + sorted(set("".join(texts)))
    index = {u: i for i, u in enumerate(units)}
    train_features = [mfcc(load_audio(row)) for row in train_rows]
    train_labels = [[index[c] for c in " ".join(t.split())] for t in texts]
    tests = []
    for path in args.test:
        rows = read_manifest(path)
        tests.append((rows, [mfcc(load_audio(row)) for row in rows]))
    prepare_seconds = time.perf_counter() - prepare_start

    model = Tdnn(train_features[0].shape[1], args.width, len(units), args.norm,
                 args.first_stride, args.dropout, args.depth)
    parameters = sum(p.numel() for p in model.parameters())
    optimizer = torch.optim.AdamW(model.parameters(), lr=args.lr, weight_decay=0.01)
    lengths = [f.shape[0] for f in train_features]
    budget = args.minutes * 60.0 if args.epochs is None else float("inf")
    batches_per_epoch = len(batches_of(lengths, args.batch, random.Random(0)))
    total_steps = (args.epochs or 0) * batches_per_epoch

    def rate(step):
        if args.schedule == "constant" or not total_steps:
            return args.lr
        warm = max(1, int(args.warmup * total_steps))
        if step < warm:
            return args.lr * (step + 1) / warm
        progress = min(1.0, (step - warm) / max(1, total_steps - warm))
        return args.lr * (0.02 + 0.98 * 0.5 * (1 + math.cos(math.pi * progress)))

    start = time.perf_counter()
    frames_done, epoch, steps = 0, 0, 0
    while time.perf_counter() - start < budget and (args.epochs is None or epoch < args.epochs):
        epoch += 1
        model.train()
        total, count = 0.0, 0
        for batch in batches_of(lengths, args.batch, rng):
            if time.perf_counter() - start >= budget:
                break
            x = pad(train_features, batch)
            log_probs = torch.log_softmax(model(x), -1).transpose(0, 1)
            out_lengths = torch.tensor([model.output_frames(lengths[i]) for i in batch])
            targets = [torch.tensor(train_labels[i]) for i in batch]
            loss = torch.nn.functional.ctc_loss(
                log_probs, torch.cat(targets), out_lengths,
                torch.tensor([len(t) for t in targets]), reduction="sum", zero_infinity=True,
            ) / out_lengths.sum()
            for group in optimizer.param_groups:
                group["lr"] = rate(steps)
            optimizer.zero_grad()
            loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 5.0)
            optimizer.step()
            total += loss.item()
            count += 1
            steps += 1
            frames_done += sum(lengths[i] for i in batch)
        elapsed = time.perf_counter() - start
        print(json.dumps({"epoch": epoch, "train_loss": total / max(count, 1),
                          "elapsed_s": round(elapsed, 1)}), flush=True)
    train_seconds = time.perf_counter() - start

    model.eval()
    decode_start = time.perf_counter()
    with torch.no_grad():
        for (rows, features), hyp_path in zip(tests, args.hyp):
            with open(hyp_path, "w", encoding="utf-8") as out:
                out.write("id\ttext\n")
                for row, f in zip(rows, features):
                    log_probs = torch.log_softmax(model(torch.from_numpy(f)[None]), -1)[0]
                    text = greedy(log_probs, model.output_frames(f.shape[0]), units)
                    out.write(f"{row['id']}\t{text}\n")
    print(json.dumps({
        "impl": "torch " + torch.__version__, "threads": args.threads, "parameters": parameters,
        "epochs": epoch, "steps": steps, "train_seconds": round(train_seconds, 1),
        "prepare_seconds": round(prepare_seconds, 1),
        "decode_seconds": round(time.perf_counter() - decode_start, 1),
        "frames_per_second": round(frames_done / train_seconds),
        "frames_per_second_per_million_parameters": round(frames_done / train_seconds / parameters * 1e6),
    }), flush=True)


if __name__ == "__main__":
    main()

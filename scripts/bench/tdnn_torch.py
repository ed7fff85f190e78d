"""PyTorch reference for the isogloss TDNN training step (benchmark, not a test).

The same architecture as configs/tdnn-small.toml (or --config FILE): per hidden layer a splice at
evenly spaced offsets (a dilated, strided Conv1d), ReLU, LayerNorm over channels, dropout; a final
linear layer over the units; CTC loss (torch.nn.functional.ctc_loss); AdamW; gradient clipping.
Random features and labels, every utterance the same length (no padding), so the figure is the
raw training-step throughput.

Prints one JSON line: {"frames_per_second": median, ...}.

Run: ../venv/bin/python scripts/bench/tdnn_torch.py --threads 2 --batch 16 --frames 600
"""

import argparse
import json
import pathlib
import statistics
import time
import tomllib

import torch


class Layer(torch.nn.Module):
    def __init__(self, input_dims, dims, offsets, subsample, dropout):
        super().__init__()
        spacing = offsets[1] - offsets[0] if len(offsets) > 1 else 1
        assert all(b - a == spacing for a, b in zip(offsets, offsets[1:])), "evenly spaced offsets"
        self.conv = torch.nn.Conv1d(input_dims, dims, len(offsets), stride=subsample, dilation=spacing)
        self.norm = torch.nn.LayerNorm(dims)
        self.dropout = torch.nn.Dropout(dropout)

    def forward(self, x):  # [B, D, T]
        y = torch.relu(self.conv(x)).transpose(1, 2)
        y = self.dropout(self.norm(y))
        return y.transpose(1, 2)


class Tdnn(torch.nn.Module):
    def __init__(self, config, input_dims, units):
        super().__init__()
        layers, dims = [], input_dims
        for layer in config["layers"]:
            layers.append(Layer(dims, layer["dims"], layer["offsets"], layer.get("subsample", 1), config.get("dropout", 0.0)))
            dims = layer["dims"]
        self.layers = torch.nn.Sequential(*layers)
        self.output = torch.nn.Linear(dims, units)

    def forward(self, x):  # [B, T, D] -> [B, T', U]
        return self.output(self.layers(x.transpose(1, 2)).transpose(1, 2))


def main():
    root = pathlib.Path(__file__).resolve().parents[2]
    parser = argparse.ArgumentParser()
    parser.add_argument("--config", default=str(root / "configs/tdnn-small.toml"))
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--frames", type=int, default=600)
    parser.add_argument("--dims", type=int, default=39)
    parser.add_argument("--units", type=int, default=40)
    parser.add_argument("--labels", type=int, default=60)
    parser.add_argument("--steps", type=int, default=12)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    config = tomllib.loads(pathlib.Path(args.config).read_text())["model"]
    model = Tdnn(config, args.dims, args.units)
    optimizer = torch.optim.AdamW(model.parameters(), lr=1e-3, weight_decay=0.01)
    # Pad the input by the network context like isogloss does, so both produce ⌈T/3⌉ frames.
    left = right = 0
    rate = 1
    for layer in config["layers"]:
        left += -layer["offsets"][0] * rate
        right += layer["offsets"][-1] * rate
        rate *= layer.get("subsample", 1)
    features = torch.randn(args.batch, args.frames + left + right, args.dims)
    labels = torch.randint(1, args.units, (args.batch, args.labels))
    times = []
    for step in range(args.steps):
        start = time.perf_counter()
        logits = model(features)
        log_probs = torch.log_softmax(logits, -1).transpose(0, 1)
        out_frames = log_probs.shape[0]
        loss = torch.nn.functional.ctc_loss(
            log_probs, labels,
            torch.full((args.batch,), out_frames, dtype=torch.long),
            torch.full((args.batch,), args.labels, dtype=torch.long),
            reduction="sum",
        ) / (args.batch * out_frames)
        optimizer.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 5.0)
        optimizer.step()
        times.append(time.perf_counter() - start)
    measured = times[2:]  # first steps warm up allocators
    median = statistics.median(measured)
    print(json.dumps({
        "impl": "torch " + torch.__version__,
        "threads": args.threads,
        "batch": args.batch,
        "frames": args.frames,
        "parameters": sum(p.numel() for p in model.parameters()),
        "output_frames": out_frames,
        "median_step_seconds": median,
        "frames_per_second": args.batch * args.frames / median,
    }))


if __name__ == "__main__":
    main()

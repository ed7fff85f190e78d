#!/usr/bin/env python3
"""Reference values of torch.nn.BatchNorm1d for isogloss-acoustic's batch-normalised TDNN layer.

Writes crates/acoustic/tests/fixtures/batchnorm_torch.json. Run with the project's reference venv:

    ../venv/bin/python scripts/reference/batchnorm_reference.py

One hidden TDNN layer with batch normalisation: z[b, t] = sum_k x[b, s*t + c_k] . W_k (taps
-1, 0, 2, so c = 0, 1, 3; keep every s = 2nd frame; W stored as isogloss stores it, the K
per-tap matrices side by side, [D, K*H]), then torch.nn.BatchNorm1d (eps 1e-5, momentum 0.1),
then ReLU. The splice is written out with torch indexing; the normalisation, its gradient and
the running statistics are torch's.

isogloss counts only each utterance's valid output frames (the first valid[b] frames of
utterance b) in the batch statistics. torch.nn.BatchNorm1d has no notion of padding, so the
valid frames of all utterances are concatenated into one [N, H] batch before it. The loss is
sum(probe * y) over the valid frames (what CTC does: frames past an utterance's end get no
gradient); isogloss's side gives the padded frames a zero probe.

Recorded:
  * "train": input x, weight, gain, shift, valid counts, probe; the valid outputs y; the
    gradients of x, the weight, the gain and the shift;
  * "running": three training passes on three inputs (running statistics starting at mean 0,
    variance 1); running_mean and running_var after each (torch's convention: the unbiased
    batch variance enters the running variance);
  * "inference": a fourth input through the layer in eval mode (running statistics of the
    third pass), every output frame.

Inputs are rounded to float32 (isogloss's type) and torch runs in float64, so the recorded
values are exact for those inputs and the remaining difference is isogloss's float32
arithmetic.
"""

import json
import pathlib

import torch

OUT = pathlib.Path(__file__).resolve().parents[2] / "crates/acoustic/tests/fixtures/batchnorm_torch.json"
TAPS = [-1, 0, 2]
KEEP_EVERY = 2
BATCH, FRAMES, DIMS, UNITS = 3, 13, 4, 6
EPSILON, MOMENTUM = 1e-5, 0.1


def f32(tensor):
    return tensor.to(torch.float32).to(torch.float64)


def frames_out():
    span = TAPS[-1] - TAPS[0]
    return (FRAMES - 1 - span) // KEEP_EVERY + 1


def pre_activation(x, weight):
    """z[b, t] = sum_k x[b, s*t + c_k] @ W_k for every output frame."""
    shifts = [tap - TAPS[0] for tap in TAPS]
    t = torch.arange(frames_out()) * KEEP_EVERY
    z = 0
    for k, shift in enumerate(shifts):
        z = z + x[:, t + shift, :] @ weight[:, k * UNITS:(k + 1) * UNITS]
    return z  # [B, T_out, H]


def valid_rows(z, valid):
    return torch.cat([z[b, :v] for b, v in enumerate(valid)], 0)


def main():
    generator = torch.Generator().manual_seed(20261221)

    def draw(*shape, scale=1.0, offset=0.0):
        return f32(torch.randn(*shape, generator=generator, dtype=torch.float64) * scale + offset)

    weight = draw(DIMS, len(TAPS) * UNITS, scale=0.6)
    gain = f32(torch.rand(UNITS, generator=generator, dtype=torch.float64) + 0.5)
    shift = draw(UNITS, scale=0.3)
    # A non-zero mean per input dimension, so that the batch mean matters.
    inputs = [draw(BATCH, FRAMES, DIMS, offset=0.4) for _ in range(4)]
    valids = [[5, 3, 1], [5, 5, 2], [4, 2, 5]]
    assert frames_out() == 5

    def layer():
        bn = torch.nn.BatchNorm1d(UNITS, eps=EPSILON, momentum=MOMENTUM, dtype=torch.float64)
        with torch.no_grad():
            bn.weight.copy_(gain)
            bn.bias.copy_(shift)
        return bn

    # Outputs and gradients of one training pass.
    x = inputs[0].clone().requires_grad_(True)
    w = weight.clone().requires_grad_(True)
    bn = layer()
    bn.train()
    valid = valids[0]
    y = torch.relu(bn(valid_rows(pre_activation(x, w), valid)))
    probe = draw(y.shape[0], UNITS)
    (probe * y).sum().backward()
    train = {
        "x": inputs[0].tolist(),
        "valid": valid,
        "probe": probe.tolist(),
        "y": y.detach().tolist(),
        "grad_x": x.grad.tolist(),
        "grad_weight": w.grad.tolist(),
        "grad_gain": bn.weight.grad.tolist(),
        "grad_shift": bn.bias.grad.tolist(),
    }

    # Running statistics over three passes, then inference.
    bn = layer()
    bn.train()
    passes = []
    with torch.no_grad():
        for x, valid in zip(inputs[:3], valids):
            bn(valid_rows(pre_activation(x, weight), valid))
            passes.append({
                "x": x.tolist(),
                "valid": valid,
                "running_mean": bn.running_mean.tolist(),
                "running_var": bn.running_var.tolist(),
            })
        bn.eval()
        z = pre_activation(inputs[3], weight)
        y_eval = torch.relu(bn(z.reshape(-1, UNITS))).reshape(z.shape)

    reference = {
        "source": f"torch.nn.BatchNorm1d (eps {EPSILON}, momentum {MOMENTUM}), torch {torch.__version__}, "
        "made by scripts/reference/batchnorm_reference.py",
        "taps": TAPS,
        "keep_every": KEEP_EVERY,
        "dims": DIMS,
        "units": UNITS,
        "weight": weight.tolist(),
        "gain": gain.tolist(),
        "shift": shift.tolist(),
        "train": train,
        "running": passes,
        "inference": {"x": inputs[3].tolist(), "y": y_eval.tolist()},
    }
    OUT.write_text(json.dumps(reference) + "\n", encoding="utf-8")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()

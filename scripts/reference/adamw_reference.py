#!/usr/bin/env python3
"""Reference trajectories of torch.optim.AdamW for isogloss-acoustic's fused AdamW step.

Writes crates/acoustic/tests/fixtures/adamw_torch.json. Run with the project's reference venv:

    ../venv/bin/python scripts/reference/adamw_reference.py

A two-layer network y = W2 tanh(W1 x + b1) with a squared-error loss on fixed random data gives
realistic gradients. Three parameters, as the trainer names them: two matrices, which get the
weight decay, and a bias, which does not (isogloss decays rank >= 2 tensors only; here a torch
parameter group with weight_decay = 0 for the bias). Two runs of twelve steps with a warm-up
and decay of the learning rate:

  * "unclipped": the gradients are used as they are (isogloss: grad_scale = 1);
  * "clipped": torch.nn.utils.clip_grad_norm_ rescales the gradients whenever their global
    L2 norm exceeds max_norm (chosen as the median norm of the unclipped run, so that some
    steps clip and some do not). torch scales by max_norm / (norm + 1e-6); isogloss by
    max_norm / norm. The 1e-6 is a relative 1e-6 / norm (below 2e-7 here) of the update.

So that both sides start from and work with the same numbers, the initial parameters and every
gradient are rounded to float32 (isogloss's type) before torch uses them; torch then runs in
float64, so the recorded trajectory is the exact AdamW trajectory for those inputs and the
remaining difference is isogloss's float32 arithmetic. Recorded per step: the learning rate,
the (float32-exact) gradients before clipping, torch's total gradient norm, whether it clipped,
and the parameters and both moment estimates (exp_avg, exp_avg_sq) after the step.
"""

import json
import pathlib

import torch

OUT = pathlib.Path(__file__).resolve().parents[2] / "crates/acoustic/tests/fixtures/adamw_torch.json"
STEPS = 12
PEAK_RATE = 0.05
WEIGHT_DECAY = 0.1


def rate(step):
    """Linear warm-up over 4 steps to the peak, then linear decay (step counts from 1)."""
    if step <= 4:
        return PEAK_RATE * step / 4
    return PEAK_RATE * (STEPS + 1 - step) / (STEPS - 3)


def f32(tensor):
    return tensor.to(torch.float32).to(torch.float64)


def start():
    generator = torch.Generator().manual_seed(20261217)
    params = {
        "layers.0.weight": torch.randn(5, 3, generator=generator, dtype=torch.float64) * 0.8,
        "layers.0.bias": torch.randn(5, generator=generator, dtype=torch.float64) * 0.3,
        "layers.1.weight": torch.randn(2, 5, generator=generator, dtype=torch.float64) * 0.8,
    }
    inputs = torch.randn(16, 3, generator=generator, dtype=torch.float64)
    targets = torch.randn(16, 2, generator=generator, dtype=torch.float64)
    params = {name: f32(value).requires_grad_(True) for name, value in params.items()}
    return params, inputs, targets


def run(max_norm):
    params, inputs, targets = start()
    initial = {name: value.detach().tolist() for name, value in params.items()}
    optimizer = torch.optim.AdamW(
        [
            {"params": [params["layers.0.weight"], params["layers.1.weight"]], "weight_decay": WEIGHT_DECAY},
            {"params": [params["layers.0.bias"]], "weight_decay": 0.0},
        ],
        lr=PEAK_RATE,
        betas=(0.9, 0.999),
        eps=1e-8,
        foreach=False,
    )
    steps = []
    for step in range(1, STEPS + 1):
        optimizer.zero_grad()
        hidden = torch.tanh(inputs @ params["layers.0.weight"].T + params["layers.0.bias"])
        loss = ((hidden @ params["layers.1.weight"].T - targets) ** 2).mean()
        loss.backward()
        gradients = {}
        for name, value in params.items():
            value.grad = f32(value.grad)
            gradients[name] = value.grad.tolist()
        if max_norm is None:
            norm = float(torch.sqrt(sum((v.grad**2).sum() for v in params.values())))
            clipped = False
        else:
            norm = float(torch.nn.utils.clip_grad_norm_(list(params.values()), max_norm))
            clipped = norm > max_norm
        for group in optimizer.param_groups:
            group["lr"] = rate(step)
        optimizer.step()
        steps.append({
            "learning_rate": rate(step),
            "gradients": gradients,
            "gradient_norm": norm,
            "clipped": clipped,
            "parameters": {name: value.detach().tolist() for name, value in params.items()},
            "first_moments": {name: optimizer.state[value]["exp_avg"].tolist() for name, value in params.items()},
            "second_moments": {name: optimizer.state[value]["exp_avg_sq"].tolist() for name, value in params.items()},
        })
    return initial, steps


def main():
    initial, unclipped = run(None)
    norms = sorted(step["gradient_norm"] for step in unclipped)
    max_norm = norms[len(norms) // 2]
    initial_clipped, clipped = run(max_norm)
    assert initial == initial_clipped
    reference = {
        "source": f"torch.optim.AdamW and torch.nn.utils.clip_grad_norm_, torch {torch.__version__}, "
        "made by scripts/reference/adamw_reference.py",
        "beta1": 0.9,
        "beta2": 0.999,
        "epsilon": 1e-8,
        "weight_decay": WEIGHT_DECAY,
        "initial": initial,
        "runs": [
            {"name": "unclipped", "max_norm": None, "steps": unclipped},
            {"name": "clipped", "max_norm": max_norm, "steps": clipped},
        ],
    }
    OUT.write_text(json.dumps(reference) + "\n", encoding="utf-8")
    clips = sum(step["clipped"] for step in clipped)
    print(f"wrote {OUT} ({STEPS} steps per run; clipped run: max_norm {max_norm:.4f}, {clips} steps clipped)")


if __name__ == "__main__":
    main()

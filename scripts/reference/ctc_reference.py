"""Reference values for the CTC loss of isogloss-acoustic, computed with PyTorch.

Writes crates/acoustic/tests/fixtures/ctc_torch.json: random logits of shape [batch, frames, units]
(batch-major, as isogloss stores them), frame lengths, padded labels with their lengths, and what
torch.nn.functional.ctc_loss (blank 0, reduction='none') returns for the log-softmax of those
logits, together with the gradient of the summed loss with respect to the raw logits.

Run: ../venv/bin/python scripts/reference/ctc_reference.py
"""

import json
import pathlib

import torch

OUT = pathlib.Path(__file__).resolve().parents[2] / "crates/acoustic/tests/fixtures/ctc_torch.json"


def case(name, seed, units, frame_lengths, labels, scale=3.0):
    generator = torch.Generator().manual_seed(seed)
    batch = len(frame_lengths)
    frames = max(frame_lengths)
    logits = (torch.randn(batch, frames, units, generator=generator, dtype=torch.float64) * scale)
    logits.requires_grad_(True)
    max_label = max([len(l) for l in labels] + [1])
    padded = torch.zeros(batch, max_label, dtype=torch.long)
    for i, l in enumerate(labels):
        if l:
            padded[i, : len(l)] = torch.tensor(l)
    log_probs = torch.log_softmax(logits, dim=-1).transpose(0, 1)  # torch wants [T, N, C]
    losses = torch.nn.functional.ctc_loss(
        log_probs,
        padded,
        torch.tensor(frame_lengths),
        torch.tensor([len(l) for l in labels]),
        blank=0,
        reduction="none",
        zero_infinity=False,
    )
    losses.sum().backward()
    return {
        "name": name,
        "batch": batch,
        "frames": frames,
        "units": units,
        "frame_lengths": frame_lengths,
        "labels": labels,
        "logits": [round(v, 7) for v in logits.detach().flatten().tolist()],
        "losses": losses.detach().tolist(),
        "grad": logits.grad.flatten().tolist(),
    }


def main():
    cases = [
        case("mixed lengths", 1, 6, [12, 9, 5, 12], [[1, 2, 3], [4, 4, 2], [5], [1, 1, 1, 2, 2]]),
        case("empty label", 2, 4, [7, 3], [[], [3]]),
        case("repeats need blanks", 3, 3, [5, 8], [[1, 1, 1], [2, 2, 1, 1]]),
        case("long", 4, 12, [60, 41, 33], [[(i * 7) % 11 + 1 for i in range(20)], [3, 3, 5, 9, 1, 2], []], 5.0),
    ]
    OUT.write_text(json.dumps({"source": "torch " + torch.__version__ + " torch.nn.functional.ctc_loss", "cases": cases}))
    print("wrote", OUT)


if __name__ == "__main__":
    main()

"""CTC label-sequence probabilities from torch, for the decoder's prefix-search check.

For a few random log-posterior matrices (blank at index 0) this writes, for every label
sequence of length 0..3 over the non-blank units, ln P(labels | posteriors) as computed by
torch.nn.functional.ctc_loss (reduction='none', i.e. the negative log-likelihood summed over
all alignments). The decoder's exact prefix search must reproduce these values.

Run: python scripts/reference/ctc_decoder_reference.py (with torch installed)
Writes: tests/fixtures/decoder/ctc_torch.json
"""

import itertools
import json
import pathlib

import numpy as np
import torch

rng = np.random.default_rng(20261202)
cases = []
for frames, units in [(4, 3), (6, 4), (5, 4)]:
    logits = rng.normal(0.0, 1.5, size=(frames, units))
    log_posteriors = torch.log_softmax(torch.tensor(logits, dtype=torch.float64), dim=-1)
    sequences = []
    for length in range(0, 4):
        for labels in itertools.product(range(1, units), repeat=length):
            # a sequence needs one frame per label plus one per repeated neighbour
            needed = length + sum(1 for a, b in zip(labels, labels[1:]) if a == b)
            if needed > frames:
                continue
            loss = torch.nn.functional.ctc_loss(
                log_posteriors.unsqueeze(1),  # [T, N=1, C]
                torch.tensor([list(labels)], dtype=torch.long) if length else torch.zeros((1, 0), dtype=torch.long),
                input_lengths=torch.tensor([frames]),
                target_lengths=torch.tensor([length]),
                blank=0,
                reduction="none",
                zero_infinity=False,
            )
            sequences.append({"labels": list(labels), "log_probability": -float(loss[0])})
    cases.append({"log_posteriors": log_posteriors.tolist(), "sequences": sequences})

out = pathlib.Path(__file__).resolve().parents[2] / "tests" / "fixtures" / "decoder" / "ctc_torch.json"
out.parent.mkdir(parents=True, exist_ok=True)
out.write_text(json.dumps({"source": "torch.nn.functional.ctc_loss " + torch.__version__, "cases": cases}))
print(f"wrote {out} ({sum(len(c['sequences']) for c in cases)} sequences)")

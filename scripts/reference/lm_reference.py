#!/usr/bin/env python3
"""Reference values from nltk.lm for the isogloss-lm cross-check.

Writes tests/fixtures/lm/nltk_reference.json from tests/fixtures/lm/nltk_train.txt and
nltk_test.txt. Run with the project's reference venv:

    ../venv/bin/python scripts/reference/lm_reference.py

Conventions are aligned with isogloss (docs/language-models.md) where nltk lets us, and every difference is
named here and in the Rust test:
  * Sentences are framed by ONE <s> and ONE </s> (nltk's pad_both_ends would add order-1 of
    each); we build the n-grams ourselves with nltk.util.everygrams.
  * Lidstone is compared at order 1 only: nltk's higher-order Lidstone adds k with a uniform
    prior, isogloss interpolates with the lower order. At order 1 both are (c + k) / (N + k|V|)
    with |V| = words + </s> + <UNK> (nltk's vocabulary length counts its <UNK> label).
  * Witten-Bell: nltk's higher-order recursion (alpha, gamma with N1+(h.)) is used as is; its
    unigram base is plain relative frequency over all padded tokens including <s>. isogloss
    interpolates unigrams with the uniform distribution and never predicts <s>, so the unigram
    score is overridden below with that convention (computed from nltk's own counts).
"""
import json
import math
from pathlib import Path

from nltk.lm import Lidstone, WittenBellInterpolated
from nltk.lm.smoothing import WittenBell
from nltk.lm.vocabulary import Vocabulary
from nltk.util import everygrams

ROOT = Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "tests" / "fixtures" / "lm"


def sentences(path):
    return [line.split() for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]


class UniformBaseWittenBell(WittenBell):
    """nltk's Witten-Bell with the isogloss unigram convention (see the module docstring)."""

    def unigram_score(self, word):
        unigrams = self.counts.unigrams
        predicted = {w: c for w, c in unigrams.items() if w != "<s>"}
        total = sum(predicted.values())
        seen = sum(1 for c in predicted.values() if c > 0)
        vocabulary_size = len(self.vocab) - 1  # every word but <s> can be predicted
        return (predicted.get(word, 0) + seen / vocabulary_size) / (total + seen)


class UniformBaseWittenBellInterpolated(WittenBellInterpolated):
    def __init__(self, order, **kwargs):
        super(WittenBellInterpolated, self).__init__(UniformBaseWittenBell, order, **kwargs)


def main():
    train = sentences(FIXTURES / "nltk_train.txt")
    test = sentences(FIXTURES / "nltk_test.txt")

    # Lidstone, order 1, k = 0.5.
    k = 0.5
    unigram_text = [[(w,) for w in s + ["</s>"]] for s in train]
    vocabulary = Vocabulary([w for s in train for w in s + ["</s>"]], unk_cutoff=1)
    lidstone = Lidstone(k, 1, vocabulary=vocabulary)
    lidstone.fit(unigram_text)
    lidstone_probabilities = {w: lidstone.score(w) for w in sorted(set(vocabulary))}
    lidstone_probabilities["<unk>"] = lidstone.score("never-seen-word")

    # Witten-Bell, order 3.
    order = 3
    framed = [["<s>"] + s + ["</s>"] for s in train]
    wb_vocabulary = Vocabulary([w for s in framed for w in s], unk_cutoff=1)
    witten_bell = UniformBaseWittenBellInterpolated(order, vocabulary=wb_vocabulary)
    witten_bell.fit([list(everygrams(s, max_len=order)) for s in framed])
    tokens = []
    total = 0.0
    for sentence in test:
        history = ["<s>"]
        for word in sentence + ["</s>"]:
            context = tuple(wb_vocabulary.lookup(history[-(order - 1):]))
            value = math.log10(witten_bell.score(word, context))
            tokens.append({"context": list(context), "word": wb_vocabulary.lookup(word), "log10": value})
            total += value
            history.append(word)

    reference = {
        "source": "nltk " + __import__("nltk").__version__ + " (nltk.lm), made by scripts/reference/lm_reference.py",
        "lidstone_unigram": {"k": k, "probabilities": lidstone_probabilities},
        "witten_bell": {"order": order, "tokens": tokens, "total_log10": total},
    }
    out = FIXTURES / "nltk_reference.json"
    out.write_text(json.dumps(reference, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    print(f"wrote {out} ({len(tokens)} tokens, total log10 {total:.6f})")


if __name__ == "__main__":
    main()

#!/usr/bin/env python3
"""Reference values from nltk.lm, and an independent modified Kneser-Ney, for isogloss-lm.

Run with the project's reference venv:

    ../venv/bin/python scripts/reference/lm_reference.py

Writes two fixtures next to the texts they are computed from:

1. tests/fixtures/lm/nltk_reference.json, from nltk_train.txt and nltk_test.txt: Lidstone
   (order 1) and Witten-Bell (order 3).
2. tests/fixtures/lm/kneser_ney_reference.json, from kneser_ney_train.txt (the first 200
   sentences of the demo corpus's normalized training transcripts) and kneser_ney_test.txt (the
   first 20 dev sentences; 13 of their words never occur in training): interpolated Kneser-Ney
   with one discount per order from nltk's KneserNeyInterpolated, and interpolated modified
   Kneser-Ney (three discounts per order) from the independent implementation below, at
   orders 2, 3 and 4.

Conventions are aligned with isogloss (docs/language-models.md) where nltk lets us, and every
difference is named here and in the Rust tests:
  * Sentences are framed by ONE <s> and ONE </s> (nltk's pad_both_ends would add order-1 of
    each); we build the n-grams ourselves with nltk.util.everygrams.
  * Lidstone is compared at order 1 only: nltk's higher-order Lidstone adds k with a uniform
    prior, isogloss interpolates with the lower order. At order 1 both are (c + k) / (N + k|V|)
    with |V| = words + </s> + <UNK> (nltk's vocabulary length counts its <UNK> label).
  * Witten-Bell: nltk's higher-order recursion (alpha, gamma with N1+(h.)) is used as is; its
    unigram base is plain relative frequency over all padded tokens including <s>. isogloss
    interpolates unigrams with the uniform distribution and never predicts <s>, so the unigram
    score is overridden below with that convention (computed from nltk's own counts).
  * Kneser-Ney: nltk's recursion (alpha = max(c - D, 0) / total, gamma = D N1+(h.) / total,
    raw counts at the highest order, continuation counts N1+(. h w) below it) is used as is,
    with three overrides, each the smallest change that makes the two definitions agree:
      - the discount: nltk takes one fixed D for every order; isogloss estimates one per order
        from the count-of-counts of that order's counts, D = n1 / (n1 + 2 n2) (Ney, Essen &
        Kneser 1994). The script computes these D from its own counts and hands nltk the D of
        the order being scored; the Rust test checks that isogloss found the same D.
      - n-grams that begin with <s> below the highest order: with one <s> nothing precedes
        them, so their continuation count is zero and nltk divides by zero; isogloss (common
        practice) keeps their raw counts, and so does the override (the same formula nltk uses
        at the highest order).
      - the unigram base: nltk's is N1+(. w) / N1+(. .), undiscounted; isogloss discounts the
        continuation counts and interpolates with the uniform distribution over the vocabulary
        without <s>, as for Witten-Bell. Overridden with that convention, from nltk's counts.
  * Modified Kneser-Ney (Chen & Goodman 1998) has no nltk implementation. It is computed by
    `IndependentKneserNey` below: plain dictionaries of counts built from the framed sentences,
    the interpolation written from the paper's definition (discounts D1, D2, D3+ by count class,
    gamma(h) = (D1 N1(h.) + D2 N2(h.) + D3+ N3+(h.)) / sum_w c(h w)). It shares no code with
    nltk or isogloss. Run with a single discount, it must reproduce the nltk values above to
    1e-12 (asserted below), which checks its counting and recursion against nltk; every context
    it scores must sum to one over the vocabulary (asserted below). The modified discounts are
    D1 = 1 - 2Y n2/n1, D2 = 2 - 3Y n3/n2, D3+ = 3 - 4Y n4/n3, Y = n1/(n1 + 2 n2) (Chen & Goodman
    1998, written here from memory of the paper).
"""
import json
import math
from collections import Counter, defaultdict
from pathlib import Path

from nltk.lm import Lidstone, WittenBellInterpolated
from nltk.lm.models import InterpolatedLanguageModel
from nltk.lm.smoothing import KneserNey, WittenBell, _count_values_gt_zero
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


def lidstone_and_witten_bell():
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


START, END, UNKNOWN = "<s>", "</s>", "<unk>"


def count_of_counts(counts):
    """n1..n4: how many n-grams have count 1, 2, 3, 4."""
    histogram = Counter(c for c in counts if 1 <= c <= 4)
    return [histogram[k] for k in (1, 2, 3, 4)]


def discounts_of(counts, modified):
    """(D1, D2, D3+) of one order; raises when the counts give no valid discount (the fixture
    must not depend on a fallback)."""
    n1, n2, n3, n4 = count_of_counts(counts)
    y = n1 / (n1 + 2 * n2)
    if not modified:
        assert 0 < y < 1, (n1, n2)
        return (y, y, y)
    d = (1 - 2 * y * n2 / n1, 2 - 3 * y * n3 / n2, 3 - 4 * y * n4 / n3)
    assert 0 < d[0] < 1 and 0 < d[1] < 2 and 0 < d[2] < 3, d
    return d


class IndependentKneserNey:
    """Interpolated Kneser-Ney, plain or modified, from the definition (module docstring)."""

    def __init__(self, sentences, order, modified):
        self.order = order
        framed = [[START] + s + [END] for s in sentences]
        raw = [None] + [Counter() for _ in range(order)]
        for sentence in framed:
            for n in range(1, order + 1):
                for i in range(len(sentence) - n + 1):
                    raw[n][tuple(sentence[i:i + n])] += 1
        left_neighbours = [None] + [defaultdict(set) for _ in range(order)]
        for n in range(2, order + 1):
            for ngram in raw[n]:
                left_neighbours[n - 1][ngram[1:]].add(ngram[0])
        # c(g): raw at the highest order and for n-grams that begin with <s>, else N1+(. g).
        self.count = [None] + [{} for _ in range(order)]
        for n in range(1, order + 1):
            for ngram, c in raw[n].items():
                keep_raw = n == order or ngram[0] == START
                self.count[n][ngram] = c if keep_raw else len(left_neighbours[n][ngram])
        del self.count[1][(START,)]  # <s> is context only, never predicted
        self.vocabulary = sorted({g[0] for g in self.count[1]} | {END, UNKNOWN})
        self.discounts = [None] + [
            discounts_of(self.count[n].values(), modified) for n in range(1, order + 1)
        ]
        # Per order, per context h: sum_w c(h w) and sum_w D(c(h w)).
        self.denominator = [None] + [defaultdict(float) for _ in range(order)]
        self.discounted = [None] + [defaultdict(float) for _ in range(order)]
        for n in range(1, order + 1):
            for ngram, c in self.count[n].items():
                self.denominator[n][ngram[:-1]] += c
                self.discounted[n][ngram[:-1]] += self.discount(n, c)

    def discount(self, n, c):
        d1, d2, d3 = self.discounts[n]
        return d1 if c == 1 else d2 if c == 2 else d3

    def probability(self, word, context):
        """P(word | context); words outside the vocabulary are <unk>."""
        known = set(self.vocabulary)
        word = word if word in known else UNKNOWN
        context = [w if w in known or w == START else UNKNOWN for w in context]
        total = self.denominator[1][()]
        c = self.count[1].get((word,), 0)
        gamma = self.discounted[1][()] / total
        p = max(c - self.discount(1, c), 0) / total + gamma / len(self.vocabulary)
        for n in range(2, self.order + 1):
            if len(context) < n - 1:
                break
            h = tuple(context[len(context) - (n - 1):])
            total = self.denominator[n].get(h)
            if total is None:
                continue  # unseen context: alpha = 0, gamma = 1
            c = self.count[n].get(h + (word,), 0)
            alpha = max(c - self.discount(n, c), 0) / total if c else 0.0
            p = alpha + self.discounted[n][h] / total * p
        return p

    def check_sums_to_one(self):
        contexts = [()] + [h for n in range(2, self.order + 1) for h in self.denominator[n]]
        for h in contexts:
            total = sum(self.probability(w, h) for w in self.vocabulary)
            assert abs(total - 1) < 1e-12, (h, total)
        return len(contexts)


class IsoglossKneserNey(KneserNey):
    """nltk's Kneser-Ney with the three overrides named in the module docstring."""

    def __init__(self, vocabulary, counter, order, discounts, **kwargs):
        super().__init__(vocabulary, counter, order, discount=discounts[1], **kwargs)
        self.discounts = discounts
        self._seen = None

    def alpha_gamma(self, word, context):
        self.discount = self.discounts[len(context) + 1]
        if len(context) + 1 < self._order and context[0] == START:
            prefix_counts = self.counts[context]
            total = prefix_counts.N()
            alpha = max(prefix_counts[word] - self.discount, 0.0) / total
            gamma = self.discount * _count_values_gt_zero(prefix_counts) / total
            return alpha, gamma
        return super().alpha_gamma(word, context)

    def unigram_score(self, word):
        discount = self.discounts[1]
        predicted = [w for w in self.vocab if w != START]
        if self._seen is None:
            self._seen = sum(1 for w in predicted if self._continuation_counts(w)[0] > 0)
        count, total = self._continuation_counts(word)
        gamma = discount * self._seen / total
        return max(count - discount, 0.0) / total + gamma / len(predicted)


class IsoglossKneserNeyInterpolated(InterpolatedLanguageModel):
    def __init__(self, order, discounts, **kwargs):
        params = {"order": order, "discounts": discounts}
        super().__init__(IsoglossKneserNey, order, params=params, **kwargs)


def kneser_ney():
    train = sentences(FIXTURES / "kneser_ney_train.txt")
    test = sentences(FIXTURES / "kneser_ney_test.txt")
    framed = [[START] + s + [END] for s in train]
    models = []
    for order in (2, 3, 4):
        plain = IndependentKneserNey(train, order, modified=False)
        modified = IndependentKneserNey(train, order, modified=True)
        contexts = plain.check_sums_to_one() + modified.check_sums_to_one()
        vocabulary = Vocabulary([w for s in framed for w in s], unk_cutoff=1)
        nltk_model = IsoglossKneserNeyInterpolated(
            order, {n: plain.discounts[n][0] for n in range(1, order + 1)}, vocabulary=vocabulary
        )
        nltk_model.fit([list(everygrams(s, max_len=order)) for s in framed])
        plain_tokens, modified_tokens = [], []
        for sentence in test:
            history = [START]
            for word in sentence + [END]:
                context = history[len(history) - min(order - 1, len(history)):]
                ours_context = [w if w in vocabulary else UNKNOWN for w in context]
                ours_word = word if word in vocabulary else UNKNOWN
                from_nltk = math.log10(nltk_model.score(word, tuple(vocabulary.lookup(context))))
                independent = math.log10(plain.probability(word, context))
                assert abs(from_nltk - independent) < 1e-12, (context, word, from_nltk, independent)
                plain_tokens.append({"context": ours_context, "word": ours_word, "log10": from_nltk})
                modified_tokens.append({
                    "context": ours_context,
                    "word": ours_word,
                    "log10": math.log10(modified.probability(word, context)),
                })
                history.append(word)
        for name, model, tokens, source in [
            ("plain", plain, plain_tokens, "nltk.lm.KneserNeyInterpolated with the overrides"),
            ("modified", modified, modified_tokens, "IndependentKneserNey"),
        ]:
            models.append({
                "discounting": name,
                "order": order,
                "source": source,
                "discounts": [list(model.discounts[n]) for n in range(1, order + 1)],
                "tokens": tokens,
                "total_log10": sum(t["log10"] for t in tokens),
            })
        print(f"order {order}: nltk and the independent plain Kneser-Ney agree on "
              f"{len(plain_tokens)} tokens; {contexts} contexts sum to one")
    reference = {
        "source": "nltk " + __import__("nltk").__version__
        + " (nltk.lm) and an independent implementation, made by scripts/reference/lm_reference.py",
        "models": models,
    }
    out = FIXTURES / "kneser_ney_reference.json"
    out.write_text(json.dumps(reference, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    print(f"wrote {out}")


def main():
    lidstone_and_witten_bell()
    kneser_ney()


if __name__ == "__main__":
    main()

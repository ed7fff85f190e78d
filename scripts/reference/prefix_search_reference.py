#!/usr/bin/env python3
"""Reference decodings for isogloss-decoder's prefix beam search with a word n-gram LM.

Writes tests/fixtures/decoder/prefix_search_reference.json. Run with the project's venv:

    ../venv/bin/python scripts/reference/prefix_search_reference.py

Written from the definitions, sharing nothing with the Rust code (numpy only for the random
inputs). The objective is the one the search documents (crates/decoder/src/search.rs):

    ln P(labels | posteriors) + lm_weight * ln P_LM(words, </s>) + word_bonus * |words|

maximised over all (labels, words) pairs where the words spell the labels by the word rule:

  lexicon-at-boundary  a word ends at the boundary unit or at the end; the units since the last
                       boundary must spell a lexicon entry (empty stretches carry no word)
  lexicon-at-word-end  no boundary unit; the labels are cut into lexicon spellings
  spelled-at-boundary  no lexicon; the units between boundaries, concatenated, are a word
  every-unit           no lexicon, no boundary; every unit is a word

P(labels) is the CTC probability (Graves et al. 2006): the sum over all frame alignments that
collapse to the labels (repeats merged, blanks, unit 0, removed). A word the LM does not know
is scored as <unk> when the LM has it; otherwise it costs unknown_word_score (natural log) and
leaves the LM history as it was (the documented SearchOptions::unknown_word_score). The LM is an
ARPA back-off model queried by the textbook recursion: log10 P(w | h) is the stored value of
the longest listed n-gram h' w with h' a suffix of h, plus the back-off weights of the listed
contexts dropped on the way (absent weights are 0); natural log = log10 * ln 10. The random
ARPA files here are not normalised (the objective does not need it) but well formed: every
n-gram's prefix and suffix are listed. In the exact cases, some unigrams and bigrams that are
no one's prefix also carry a back-off weight, which the format allows; it applies to whatever
word follows, and isogloss's LM charges it as soon as the n-gram is entered. That moves the weight
earlier in a partial hypothesis's rank (not in any final score), so the beam cases, whose
reference ranks by the textbook partial LM score, use models without such weights.

Two references, and cases for each:

  * exact: all T-frame alignments are enumerated (units^T of them, at most 5^7), P(labels) is
    summed, every reading of every label sequence is scored, and the maximum is taken. Recorded:
    the best score, every (labels, words) within 1e-9 of it, and the ten best scores. The
    isogloss search must find the maximum with an unlimited beam (SearchOptions::exact).
  * beam: a textbook CTC prefix beam search (Graves & Jaitly 2014; Hannun et al. 2014) over
    hypotheses (labels, words with where each ends) with probabilities of ending in blank and
    in a label, a word scored by the LM when the word rule completes it. After every frame the `beam` hypotheses
    of highest rank ln(P_blank + P_label) + lm_weight * ln P_LM(completed words) +
    word_bonus * |completed words| are kept. Run with an unlimited beam on every exact case,
    it must reproduce the enumeration (asserted here), which checks this implementation; on
    longer inputs (25-40 frames) it is the reference for isogloss run with the same beam and
    no other pruning (look-ahead off, no unit or score margin, no blank skipping). So that
    float32 rounding in isogloss cannot swap two hypotheses at the cut, a case is kept only if
    at every frame the ranks on either side of the cut differ by more than 0.01, and the five
    best final scores by more than 0.01.
"""

import itertools
import json
import math
import pathlib

import numpy as np

OUT = pathlib.Path(__file__).resolve().parents[2] / "tests" / "fixtures" / "decoder" / "prefix_search_reference.json"
LN10 = math.log(10.0)
UNKNOWN_WORD_SCORE = -20.0
RULES = ["lexicon-at-boundary", "lexicon-at-word-end", "spelled-at-boundary", "every-unit"]
GAP = 0.01


# ----------------------------------------------------------------------------------------------
# The ARPA language model


class ArpaModel:
    """Back-off n-gram model from ARPA text, queried by the textbook recursion."""

    def __init__(self, text):
        self.prob, self.backoff = {}, {}
        order = None
        for line in text.splitlines():
            line = line.strip()
            if not line or line.startswith("ngram ") or line in ("\\data\\", "\\end\\"):
                continue
            if line.endswith("-grams:"):
                order = int(line[1:line.index("-")])
                continue
            fields = line.split()
            words = tuple(fields[1:1 + order])
            self.prob[words] = float(fields[0])
            if len(fields) > 1 + order:
                self.backoff[words] = float(fields[1 + order])
        self.order = max(len(k) for k in self.prob)
        self.vocabulary = {k[0] for k in self.prob if len(k) == 1}

    def log10(self, history, word):
        history = tuple(history[len(history) - min(len(history), self.order - 1):])
        if history + (word,) in self.prob:
            return self.prob[history + (word,)]
        if not history:
            return self.prob[(word,)]
        return self.backoff.get(history, 0.0) + self.log10(history[1:], word)

    def sentence_score(self, words):
        """ln P(words, </s>), unknown words as documented in the module docstring."""
        history = ["<s>"]
        total = 0.0
        for word in words:
            if word not in self.vocabulary:
                if "<unk>" not in self.vocabulary:
                    total += UNKNOWN_WORD_SCORE
                    continue
                word = "<unk>"
            total += self.log10(history, word) * LN10
            history.append(word)
        return total + self.log10(history, "</s>") * LN10

    def prefix_score(self, words):
        """ln P(words) without </s> (the completed words of a partial hypothesis)."""
        history = ["<s>"]
        total = 0.0
        for word in words:
            if word not in self.vocabulary:
                if "<unk>" not in self.vocabulary:
                    total += UNKNOWN_WORD_SCORE
                    continue
                word = "<unk>"
            total += self.log10(history, word) * LN10
            history.append(word)
        return total


def random_arpa(rng, words, with_unknown, stray_backoffs):
    """A random well-formed trigram ARPA text over `words` (module docstring); with
    `stray_backoffs`, some n-grams that are no one's prefix carry a back-off weight."""
    vocabulary = list(words) + ["</s>"] + (["<unk>"] if with_unknown else [])
    histories = ["<s>"] + list(words) + (["<unk>"] if with_unknown else [])
    unigrams = {("<s>",): -99.0}
    for w in vocabulary:
        unigrams[(w,)] = float(rng.uniform(-2.5, -0.3))
    bigrams = {}
    for h in histories:
        for w in vocabulary:
            if rng.random() < 0.45:
                bigrams[(h, w)] = float(rng.uniform(-2.0, -0.1))
    trigrams = {}
    for (h1, h2) in bigrams:
        if h2 == "</s>":
            continue
        for w in vocabulary:
            if (h2, w) in bigrams and rng.random() < 0.4:
                trigrams[(h1, h2, w)] = float(rng.uniform(-1.5, -0.05))
    prefixes = {k[:-1] for k in list(bigrams) + list(trigrams)}
    lines = ["\\data\\", f"ngram 1={len(unigrams)}", f"ngram 2={len(bigrams)}", f"ngram 3={len(trigrams)}", ""]
    lines.append("\\1-grams:")
    for (w,), p in unigrams.items():
        # Contexts carry a weight; with `stray_backoffs`, so do most n-grams that are no one's
        # prefix.
        weighted = (w,) in prefixes or (stray_backoffs and w != "</s>" and rng.random() < 0.8)
        backoff = f"\t{rng.uniform(-0.8, 0.2):.4f}" if weighted else ""
        lines.append(f"{p:.4f}\t{w}{backoff}")
    lines += ["", "\\2-grams:"]
    for (h, w), p in bigrams.items():
        weighted = (h, w) in prefixes or (stray_backoffs and w != "</s>" and rng.random() < 0.2)
        backoff = f"\t{rng.uniform(-0.8, 0.2):.4f}" if weighted else ""
        lines.append(f"{p:.4f}\t{h} {w}{backoff}")
    lines += ["", "\\3-grams:"]
    for (h1, h2, w), p in trigrams.items():
        lines.append(f"{p:.4f}\t{h1} {h2} {w}")
    lines += ["", "\\end\\", ""]
    return "\n".join(lines)


# ----------------------------------------------------------------------------------------------
# Word rules


class Case:
    def __init__(self, rule, symbols, lexicon, posteriors, arpa, lm_weight, word_bonus):
        self.rule = rule
        self.symbols = symbols  # unit names; index 0 is the blank, "<boundary>" the boundary
        self.boundary = symbols.index("<boundary>") if "<boundary>" in symbols else None
        self.lexicon = lexicon  # [(word, (unit ids))] or None
        self.posteriors = posteriors  # ln, float64 of float32 values, [T, U]
        self.arpa = arpa
        self.lm = ArpaModel(arpa)
        self.lm_weight = lm_weight
        self.word_bonus = word_bonus

    def spell(self, units):
        return "".join(self.symbols[u] for u in units)

    def homophones(self, units):
        return sorted({w for w, spelling in self.lexicon if spelling == tuple(units)})

    def is_prefix(self, units):
        units = tuple(units)
        return any(spelling[:len(units)] == units for _, spelling in self.lexicon)

    def readings(self, labels):
        """Every word sequence the labels can be read as (the module docstring's rules)."""
        if self.rule == "every-unit":
            return [[self.spell([u]) for u in labels]]
        if self.rule == "spelled-at-boundary":
            chunks = split(labels, self.boundary)
            return [[self.spell(c) for c in chunks]]
        if self.rule == "lexicon-at-boundary":
            choices = [self.homophones(c) for c in split(labels, self.boundary)]
            return [list(words) for words in itertools.product(*choices)]
        out = []  # lexicon-at-word-end: every cut into spellings
        if not labels:
            return [[]]
        for cut in range(1, len(labels) + 1):
            for word in self.homophones(labels[:cut]):
                for rest in self.readings(labels[cut:]):
                    out.append([word] + rest)
        return out

    def objective(self, log_p_labels, words):
        return log_p_labels + self.lm_weight * self.lm.sentence_score(words) + self.word_bonus * len(words)


def split(labels, boundary):
    chunks, current = [], []
    for u in labels:
        if u == boundary:
            if current:
                chunks.append(current)
            current = []
        else:
            current.append(u)
    if current:
        chunks.append(current)
    return chunks


# ----------------------------------------------------------------------------------------------
# Reference 1: enumeration


def label_probabilities(posteriors):
    frames, units = posteriors.shape
    probabilities = np.exp(posteriors)
    out = {}
    for alignment in itertools.product(range(units), repeat=frames):
        p = 1.0
        for t, u in enumerate(alignment):
            p *= probabilities[t, u]
        labels, previous = [], 0
        for u in alignment:
            if u != 0 and u != previous:
                labels.append(u)
            previous = u
        out[tuple(labels)] = out.get(tuple(labels), 0.0) + p
    return out


def enumerate_all(case):
    """Every (score, labels, words), best first."""
    scored = []
    for labels, p in label_probabilities(case.posteriors).items():
        for words in case.readings(list(labels)):
            scored.append((case.objective(math.log(p), words), list(labels), words))
    scored.sort(key=lambda item: -item[0])
    return scored


# ----------------------------------------------------------------------------------------------
# Reference 2: prefix beam search


def log_add(a, b):
    if a == -math.inf:
        return b
    if b == -math.inf:
        return a
    hi, lo = max(a, b), min(a, b)
    return hi + math.log1p(math.exp(lo - hi))


def extensions(case, words, partial, unit, position):
    """(words, partial) after emitting `unit` as label number `position`, for every
    continuation the word rule allows. A word is kept with the label position where it ends,
    so that two segmentations of the same labels into the same words stay two hypotheses (each
    carries the full probability of the labels; merging them would count it twice)."""
    if case.rule == "every-unit":
        return [(words + ((case.spell([unit]), position),), ())]
    is_boundary = unit == case.boundary
    if case.rule == "spelled-at-boundary":
        if is_boundary:
            return [(words + ((case.spell(partial), position),), ())] if partial else [(words, ())]
        return [(words, partial + (unit,))]
    if case.rule == "lexicon-at-boundary":
        if is_boundary:
            if not partial:
                return [(words, ())]
            return [(words + ((w, position),), ()) for w in case.homophones(partial)]
        return [(words, partial + (unit,))] if case.is_prefix(partial + (unit,)) else []
    longer = partial + (unit,)  # lexicon-at-word-end
    out = [(words + ((w, position),), ()) for w in case.homophones(longer)]
    if any(len(s) > len(longer) and s[:len(longer)] == longer for _, s in case.lexicon):
        out.append((words, longer))
    return out


def context_score(case, words):
    names = [word for word, _ in words]
    return case.lm_weight * case.lm.prefix_score(names) + case.word_bonus * len(names)


def prefix_beam_search(case, beam):
    """Returns (finals best first as (score, labels, words), smallest rank gap at the cut)."""
    # key: (labels, (word, end) pairs, partial word) -> [ln P ending in blank, in a label]
    hypotheses = {((), (), ()): [0.0, -math.inf]}
    smallest_gap = math.inf
    for row in case.posteriors:
        following = {}

        def add(key, blank, label):
            entry = following.setdefault(key, [-math.inf, -math.inf])
            entry[0] = log_add(entry[0], blank)
            entry[1] = log_add(entry[1], label)

        for (labels, words, partial), (blank, label) in hypotheses.items():
            total = log_add(blank, label)
            add((labels, words, partial), total + row[0], -math.inf)
            if labels:
                add((labels, words, partial), -math.inf, label + row[labels[-1]])
            for unit in range(1, len(row)):
                source = blank if labels and labels[-1] == unit else total
                if source == -math.inf:
                    continue
                for new_words, new_partial in extensions(case, words, partial, unit, len(labels)):
                    add((labels + (unit,), new_words, new_partial), -math.inf, source + row[unit])
        ranked = sorted(
            following.items(),
            key=lambda item: -(log_add(*item[1]) + context_score(case, item[0][1])),
        )
        if beam is not None and len(ranked) > beam:
            rank = [log_add(*v) + context_score(case, k[1]) for k, v in ranked]
            smallest_gap = min(smallest_gap, rank[beam - 1] - rank[beam])
            ranked = ranked[:beam]
        hypotheses = dict(ranked)
    finals = []
    for (labels, ended, partial), (blank, label) in hypotheses.items():
        acoustic = log_add(blank, label)
        if acoustic == -math.inf:
            continue
        words = tuple(word for word, _ in ended)
        if partial:
            if case.rule == "lexicon-at-word-end":
                continue
            if case.rule == "spelled-at-boundary":
                endings = [words + (case.spell(partial),)]
            else:
                endings = [words + (w,) for w in case.homophones(partial)]
        else:
            endings = [words]
        for finished in endings:
            finals.append((case.objective(acoustic, list(finished)), list(labels), list(finished)))
    finals.sort(key=lambda item: -item[0])
    return finals, smallest_gap


# ----------------------------------------------------------------------------------------------
# Cases


def random_case(rng, rule, frames, stray_backoffs):
    boundary = rule in ("lexicon-at-boundary", "spelled-at-boundary")
    symbol_count = int(rng.integers(2, 4))
    symbols = ["<blank>"] + ["a", "b", "c"][:symbol_count] + (["<boundary>"] if boundary else [])
    symbol_ids = list(range(1, symbol_count + 1))
    lexicon = None
    if rule.startswith("lexicon"):
        def spelling():
            return tuple(int(u) for u in rng.choice(symbol_ids, size=int(rng.integers(1, 4))))

        lexicon = [(f"w{i}", spelling()) for i in range(int(rng.integers(2, 5)))]
        if rng.random() < 0.5:
            lexicon.append(("h0", lexicon[0][1]))  # a homophone of w0
        if rng.random() < 0.5:
            lexicon.append(("w1", spelling()))  # a second pronunciation of w1
        words = sorted({w for w, _ in lexicon})
    else:
        names = ["a", "b", "c"][:symbol_count]
        words = sorted(set(names) | {x + y for x in names for y in names})
    # the LM misses one word, so that <unk> or the unknown-word score is used
    lm_words = [w for w in words if w != words[int(rng.integers(0, len(words)))]]
    arpa = random_arpa(rng, lm_words, bool(rng.random() < 0.5), stray_backoffs)
    logits = rng.normal(0.0, 1.6, size=(frames, len(symbols)))
    logits[:, 0] += 0.8  # blank somewhat more likely, as in trained CTC models
    log_posteriors = logits - np.log(np.exp(logits).sum(axis=1, keepdims=True))
    log_posteriors = log_posteriors.astype(np.float32).astype(np.float64)  # isogloss reads f32
    lm_weight = float(np.round(rng.uniform(0.3, 2.0), 3))
    word_bonus = float(np.round(rng.uniform(-1.0, 1.5), 3))
    return Case(rule, symbols, lexicon, log_posteriors, arpa, lm_weight, word_bonus)


def case_record(case, name, beam):
    return {
        "name": name,
        "rule": case.rule,
        "units": case.symbols,
        "boundary": case.boundary,
        "lexicon": None if case.lexicon is None
        else [[w, [case.symbols[u] for u in spelling]] for w, spelling in case.lexicon],
        "log_posteriors": case.posteriors.tolist(),
        "arpa": case.arpa,
        "lm_weight": case.lm_weight,
        "word_bonus": case.word_bonus,
        "unknown_word_score": UNKNOWN_WORD_SCORE,
        "beam": beam,
    }


def reading(score, labels, words):
    return {"score": score, "labels": labels, "words": words}


def main():
    rng = np.random.default_rng(20261217)
    cases = []
    exact_count = 0
    for rule in RULES:
        for index in range(10):
            frames = int(rng.integers(3, 8))
            case = random_case(rng, rule, frames, stray_backoffs=True)
            while len(case.symbols) ** frames > 5**7:
                frames -= 1
                case = random_case(rng, rule, frames, stray_backoffs=True)
            everything = enumerate_all(case)
            best = everything[0][0]
            searched, _ = prefix_beam_search(case, None)
            # the prefix search with an unlimited beam is the enumeration
            assert len(searched) == len(everything), (rule, index)
            for (a, _, _), (b, _, _) in zip(searched, everything):
                assert abs(a - b) < 1e-9, (rule, index, a, b)
            record = case_record(case, f"exact {rule} {index}", None)
            record["best"] = [reading(*item) for item in everything if item[0] > best - 1e-9]
            record["top_scores"] = [item[0] for item in everything[:10]]
            cases.append(record)
            exact_count += 1
    beam_count = 0
    for rule in RULES:
        kept = 0
        while kept < 4:
            frames = int(rng.integers(25, 41))
            beam = int(rng.choice([2, 4, 8]))
            case = random_case(rng, rule, frames, stray_backoffs=False)
            finals, smallest_gap = prefix_beam_search(case, beam)
            top = finals[:5]
            gaps = [a[0] - b[0] for a, b in zip(top, top[1:])]
            if len(top) < 2 or smallest_gap <= GAP or min(gaps) <= GAP:
                continue  # a near tie that float32 could break either way
            record = case_record(case, f"beam {rule} {kept}", beam)
            record["top"] = [reading(*item) for item in top]
            record["smallest_rank_gap"] = smallest_gap
            cases.append(record)
            kept += 1
            beam_count += 1
    reference = {
        "source": "independent Python enumeration and prefix beam search, "
        "made by scripts/reference/prefix_search_reference.py",
        "cases": cases,
    }
    OUT.write_text(json.dumps(reference) + "\n", encoding="utf-8")
    print(f"wrote {OUT}: {exact_count} exact cases, {beam_count} beam cases")


if __name__ == "__main__":
    main()

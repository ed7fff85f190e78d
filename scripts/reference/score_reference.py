#!/usr/bin/env python3
"""Reference values for isogloss-score: word-level edit distances from rapidfuzz.

Generates reference/hypothesis pairs of words from the project's invented Wendle Valley scenario
(eye-dialect spellings and English words with diacritics, with capitals, decomposed accents,
apostrophes, hyphens and punctuation, so the token rules are exercised too), tokenizes them with
an independent Python implementation of the token rules of docs/scoring.md (NFC via unicodedata, str.lower,
Unicode general category P* except apostrophes and hyphens -> space, str.split) and records
rapidfuzz.distance.Levenshtein.distance over the token lists.

Run:  ../venv/bin/python scripts/reference/score_reference.py > tests/fixtures/score/rapidfuzz_wer.json
"""

import json
import random
import sys
import unicodedata

import rapidfuzz
from rapidfuzz.distance import Levenshtein

# Same set as KEPT_PUNCTUATION in crates/score/src/tokens.rs.
KEPT = {"'", "\u2019", "-", "\u2010", "\u2011"}

# Eye-dialect spellings of the Wendle Valley scenario and English words with diacritics; some
# written decomposed (e + U+0302 combining circumflex, i + U+0308 combining diaeresis), some with
# capitals, typographic (U+2019) or ASCII apostrophes, or a hyphen.
WORDS = [
    "fête", "fe\u0302te", "naïve", "nai\u0308ve", "coöperative", "hoose", "hoos", "aboot",
    "doon", "owd", "auld", "cowd", "telt", "nowt", "yow", "lickle", "de", "dis", "nuffink", "fer",
    "jus’", "jus'", "an’", "o’er", "fell-side", "mornin’", "Hoose", "OWD", "NAÏVE", "Fête",
]
# Punctuation attached before/after words; all of these are P* in Unicode 14 and later.
PUNCT_BEFORE = ["", "", "", "«", "(", "¿", "\u201e", "\""]
PUNCT_AFTER = ["", "", "", ",", ".", "!", "?", "»", ")", ";", ":", "\u2026", "\u201c"]


def tokenize(text):
    text = unicodedata.normalize("NFC", text).lower()
    text = "".join(
        " " if unicodedata.category(c).startswith("P") and c not in KEPT else c for c in text
    )
    return text.split()


def sentence(rng, length):
    words = []
    for _ in range(length):
        words.append(rng.choice(PUNCT_BEFORE) + rng.choice(WORDS) + rng.choice(PUNCT_AFTER))
    return " ".join(words)


def mutate(rng, ref_text):
    """A hypothesis near the reference: words substituted, dropped, inserted."""
    words = ref_text.split()
    out = []
    for word in words:
        roll = rng.random()
        if roll < 0.15:
            continue
        if roll < 0.35:
            out.append(rng.choice(WORDS))
        else:
            out.append(word)
        if rng.random() < 0.1:
            out.append(rng.choice(WORDS) + rng.choice(PUNCT_AFTER))
    return " ".join(out)


def main():
    rng = random.Random(20261202)
    pairs = []
    for index in range(240):
        if index % 24 == 0:
            ref, hyp = sentence(rng, rng.randint(1, 8)), ""  # empty hypothesis
        elif index % 24 == 1:
            ref, hyp = "", sentence(rng, rng.randint(0, 5))  # empty reference
        elif index % 24 == 2:
            ref, hyp = " ... ", "«»"  # punctuation only: both empty after tokenizing
        elif index % 3 == 0:
            ref, hyp = sentence(rng, rng.randint(1, 12)), sentence(rng, rng.randint(0, 12))
        else:
            ref = sentence(rng, rng.randint(1, 12))
            hyp = mutate(rng, ref)
        ref_tokens, hyp_tokens = tokenize(ref), tokenize(hyp)
        pairs.append({
            "id": f"p{index:03d}",
            "ref": ref,
            "hyp": hyp,
            "ref_tokens": ref_tokens,
            "hyp_tokens": hyp_tokens,
            "distance": Levenshtein.distance(ref_tokens, hyp_tokens),
        })
    document = {
        "source": f"rapidfuzz {rapidfuzz.__version__} Levenshtein.distance over token lists; "
                  f"tokens by Python unicodedata (Unicode {unicodedata.unidata_version})",
        "generator": "scripts/reference/score_reference.py",
        "total_distance": sum(p["distance"] for p in pairs),
        "total_ref_words": sum(len(p["ref_tokens"]) for p in pairs),
        "pairs": pairs,
    }
    # One pair a line keeps the fixture small and its diffs readable.
    text = json.dumps(document, ensure_ascii=False, indent=1)
    body = ",\n".join("  " + json.dumps(p, ensure_ascii=False) for p in pairs)
    start = text.index('"pairs": [') + len('"pairs": [')
    sys.stdout.write(text[:start] + "\n" + body + "\n ]\n}\n")


if __name__ == "__main__":
    main()

"""Invented lexicons and N-best messages, seeded, for measuring the lexicon stage at any size.

A lexicon mixes everyday words from the shipped frequency list with made-up names from
random syllables, so both CMUdict and the G2P model are exercised. A message is ten
hypotheses of eight everyday words; every third hypothesis holds one entry's name with one
letter of each word changed, the way a recogniser mishears a name it does not know.

The random streams are part of the contract: the lexicon output digest
(tests/stages/lexicon/digests.py) and the published benchmark numbers were made with them,
so a change here that draws differently changes both.
"""

from __future__ import annotations

import csv
import random
from pathlib import Path

from stages.lexicon.sound.pronounce import common_words

__all__ = ["make_lexicon", "make_messages"]

_ONSETS = ["b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z", "br", "dr", "kl", "pr", "st", "tr",
           "sh", "ch", "th"]
_NUCLEI = ["a", "e", "i", "o", "u", "ai", "ee", "oo", "ou", "ia"]
_CODAS = ["", "", "n", "r", "l", "s", "k", "m", "nd", "st"]


def _invented(rng: random.Random) -> str:
    return "".join(rng.choice(_ONSETS) + rng.choice(_NUCLEI) + rng.choice(_CODAS)
                   for _ in range(rng.randint(2, 3)))


def make_lexicon(size: int, path: Path, seed: int) -> list[str]:
    """Write a lexicon CSV of ``size`` distinct entries (ids ``e0``, ``e1``, ...) to ``path``;
    return the entry names in id order."""
    rng = random.Random(seed)
    everyday = [w for w, z in common_words().items() if 3.0 <= z < 5.0 and len(w) > 3]
    names: list[str] = []
    seen: set[str] = set()
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["id", "type", "name", "aliases", "weight"])
        while len(names) < size:
            count = rng.choice((1, 2, 2, 3))
            # A one-word entry is an invented name; everyday words appear only inside longer names.
            words = [_invented(rng) if count == 1 or rng.random() < 0.6 else rng.choice(everyday)
                     for _ in range(count)]
            name = " ".join(words)
            if name in seen:
                continue
            seen.add(name)
            alias = words[0] if len(words) > 1 and rng.random() < 0.3 else ""
            writer.writerow([f"e{len(names)}", rng.choice(("person", "machine", "place")), name, alias, "1.0"])
            names.append(name)
    return names


def _mutate(word: str, rng: random.Random) -> str:
    if len(word) < 3:
        return word
    i = rng.randrange(1, len(word) - 1)
    return word[:i] + rng.choice("aeioulnrst") + word[i + 1:]


def make_messages(names: list[str], count: int, seed: int) -> list[tuple[int, list[str]]]:
    """``count`` 10-best lists of 8-word hypotheses, each with the index into ``names`` of
    the entry planted (misheard) in every third hypothesis."""
    rng = random.Random(seed)
    vocabulary = [w for w, z in common_words().items() if z >= 4.5]
    messages = []
    for _ in range(count):
        base = [rng.choice(vocabulary) for _ in range(8)]
        planted = rng.randrange(len(names))
        name = names[planted].split()
        hyps = []
        for rank in range(10):
            words = list(base)
            for _ in range(2):
                words[rng.randrange(8)] = rng.choice(vocabulary)
            if rank % 3 == 0:
                heard = [_mutate(w, rng) for w in name]
                at = rng.randrange(0, 8 - len(heard) + 1)
                words[at:at + len(heard)] = heard
            hyps.append(" ".join(words[:8]))
        messages.append((planted, hyps))
    return messages

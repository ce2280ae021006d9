"""Benchmark `build-lm`: wall time and peak memory on about 1M words of text.

Two synthetic corpora, both seeded:

- ``zipf``: sentences of 4..16 words drawn from a 20,000-word Zipf vocabulary. Nearly every
  trigram is new, so this is the worst case for memory and time.
- ``templated``: command-like sentences from a small grammar over a 2,000-word vocabulary,
  closer to real in-domain text (many repeats).

Each run is a separate `python -m relay.cli.build_lm` process, so the peak RSS reported
(from getrusage of the child) is the estimator's alone. Target: <= 60 s for 1M words at order 3.

    PYTHONPATH=. python benchmarks/bench_build_lm.py [--words 1000000] [--order 3]
"""

from __future__ import annotations

import argparse
import os
import random
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _word(prefix: str, index: int) -> str:
    # letters only, so the tokeniser keeps each as one word (digits would be spelled out)
    letters = ""
    while True:
        index, digit = divmod(index, 26)
        letters += chr(ord("a") + digit)
        if index == 0:
            return prefix + letters


def _zipf_corpus(path: Path, words: int, rng: random.Random) -> None:
    vocab = [_word("w", i) for i in range(20_000)]
    weights = [1 / (rank + 1) for rank in range(len(vocab))]
    written = 0
    with path.open("w", encoding="utf-8") as out:
        while written < words:
            length = rng.randint(4, 16)
            out.write(" ".join(rng.choices(vocab, weights, k=length)) + "\n")
            written += length


def _templated_corpus(path: Path, words: int, rng: random.Random) -> None:
    verbs = [_word("v", i) for i in range(60)]
    things = [_word("t", i) for i in range(1_500)]
    places = [_word("p", i) for i in range(300)]
    times = ["now", "today", "tonight", "tomorrow", "later", "soon"] + [_word("at", i) for i in range(100)]
    patterns = [
        lambda: ["please", rng.choice(verbs), "the", rng.choice(things)],
        lambda: [rng.choice(verbs), "the", rng.choice(things), "in", "the", rng.choice(places)],
        lambda: ["can", "you", rng.choice(verbs), "the", rng.choice(things), rng.choice(times)],
        lambda: ["where", "is", "the", rng.choice(things)],
        lambda: ["move", "the", rng.choice(things), "from", rng.choice(places), "to", rng.choice(places)],
    ]
    written = 0
    with path.open("w", encoding="utf-8") as out:
        while written < words:
            sentence = rng.choice(patterns)()
            out.write(" ".join(sentence) + "\n")
            written += len(sentence)


def _run(corpus: Path, order: int, raw: bool) -> tuple[float, float]:
    model = corpus.with_suffix(".arpa")
    command = [sys.executable, "-m", "relay.cli.build_lm", str(corpus), "-o", str(model),
               "--order", str(order), "--no-progress"] + (["--raw"] if raw else [])
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    began = time.perf_counter()
    subprocess.run(command, check=True, env={**os.environ, "PYTHONPATH": os.getcwd()})
    elapsed = time.perf_counter() - began
    peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    # ru_maxrss of children is the largest child so far; runs go smallest-first to keep it honest
    return elapsed, max(peak_kb, before) / 1024


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--words", type=int, default=1_000_000)
    parser.add_argument("--order", type=int, default=3)
    args = parser.parse_args()
    rng = random.Random(20261202)
    with tempfile.TemporaryDirectory(prefix="bench-build-lm-") as tmp:
        rows = []
        for name, make in (("templated", _templated_corpus), ("zipf", _zipf_corpus)):
            corpus = Path(tmp) / f"{name}.txt"
            make(corpus, args.words, rng)
            for raw in (True, False):
                elapsed, peak_mb = _run(corpus, args.order, raw)
                size_mb = corpus.with_suffix(".arpa").stat().st_size / 1e6
                rows.append((name, "raw" if raw else "tokenised", elapsed, peak_mb, size_mb))
                print(f"{name:10} {rows[-1][1]:9} order {args.order}: {elapsed:6.1f} s, "
                      f"peak RSS {peak_mb:7.1f} MB, ARPA {size_mb:6.1f} MB", flush=True)
    worst = max(row[2] for row in rows)
    print(f"slowest: {worst:.1f} s (target <= 60 s for 1M words at order 3)")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Benchmark the lexicon stage: per-message latency, build time and memory at several sizes.

Lexicons of invented entries and 10-best x 8-word messages with a misheard entry name planted
in every third hypothesis (relay/workbench/synthetic.py). Each size runs in its own process so
memory is measured cleanly.

    python benchmarks/bench_lexicon.py                    # 1k, 10k, 100k entries
    python benchmarks/bench_lexicon.py --sizes 10000 --messages 500
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np
import psutil
from tqdm import tqdm

from relay.workbench.bench import build_lexicon
from relay.workbench.synthetic import make_messages


def build(size: int, folder: Path, seed: int) -> dict[str, float]:
    """Write the lexicon and compile it cold into the folder's cache."""
    return {"build_s": round(build_lexicon(folder, size, seed), 2)}


def corpus_messages(path: Path, count: int) -> list[tuple[int, list[str]]]:
    """N-best texts of a recorded corpus (FORMATS section 5); no entry is planted in them."""
    rows = [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
    return [(-1, [h["text"] for h in row["message"]["nbest"]]) for row in rows[:count]]


def measure(folder: Path, count: int, seed: int, corpus: Path | None = None) -> dict[str, float]:
    """Warm load from the cache, then per-message latency and memory, as a restarted relay sees them."""
    from relay.core.stage import StageContext
    from relay.core.utterance import Hypothesis, TraceEntry, Utterance
    from relay.live.heap import freeze_loaded
    from stages.lexicon.settings import LexiconSettings
    from stages.lexicon.stage import LexiconStage
    from stages.normalize.stage import NormalizeSettings, NormalizeStage

    context = StageContext(base_dir=folder, cache_dir=folder / "cache")
    stage = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    began = time.perf_counter()
    stage.load()
    warm = time.perf_counter() - began
    names = [entry.name for entry in stage._lexicon.entries]
    messages = corpus_messages(corpus, count) if corpus else make_messages(names, count, seed + 1)
    normalize = NormalizeStage(NormalizeSettings(prefer="rank"), context=context)
    freeze_loaded()  # as `rehear run` does once the chain is loaded (relay/heap.py)
    times = []
    for _, texts in tqdm(messages, desc=f"{len(names)} entries", leave=False):
        nbest = [Hypothesis(t, r, {}) for r, t in enumerate(texts)]
        utt = normalize.process(Utterance("m", "bench", None, {}, nbest))
        utt.trace.append(TraceEntry("lexicon"))
        began = time.perf_counter_ns()
        stage.process(utt)
        times.append((time.perf_counter_ns() - began) / 1e6)
    rss = psutil.Process().memory_info().rss / 2**20
    # Untimed: the same settings with a long trace tell whether retrieval found the planted entry.
    stage.settings = stage.settings.model_copy(update={"trace_top": 50})
    found = 0
    for planted, texts in messages:
        nbest = [Hypothesis(t, r, {}) for r, t in enumerate(texts)]
        utt = normalize.process(Utterance("m", "bench", None, {}, nbest))
        utt.trace.append(TraceEntry("lexicon"))
        stage.process(utt)
        found += any(c["id"] == f"e{planted}" for c in utt.trace[-1].scores["candidates"])
    ms = np.asarray(times[min(20, len(times) // 10):])  # the first messages fill the word caches
    return {"entries": len(names), "warm_load_s": round(warm, 2),
            "p50_ms": round(float(np.percentile(ms, 50)), 3), "p99_ms": round(float(np.percentile(ms, 99)), 3),
            "rss_mb": round(rss, 1), "found": round(found / len(messages), 3)}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark the lexicon stage (latency, build time, memory).")
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000, 100000], help="lexicon sizes")
    parser.add_argument("--messages", type=int, default=400, help="messages per size (default 400)")
    parser.add_argument("--seed", type=int, default=7, help="random seed")
    parser.add_argument("--corpus", type=Path, help="time the N-best lists of this corpus.jsonl instead "
                        "of generated messages (the planted-entry column is then meaningless)")
    parser.add_argument("--child", nargs=2, metavar=("STEP", "FOLDER"), help=argparse.SUPPRESS)
    parser.add_argument("--size", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        step, folder = args.child
        result = build(args.size, Path(folder), args.seed) if step == "build" else \
            measure(Path(folder), args.messages, args.seed, args.corpus)
        print(json.dumps(result))
        return 0
    print("| entries | cold build s | warm load s | p50 ms | p99 ms | RSS MB | planted entry among candidates |")
    print("|---:|---:|---:|---:|---:|---:|---:|")
    for size in args.sizes:
        with tempfile.TemporaryDirectory() as tmp:
            r: dict[str, float] = {}
            for step in ("build", "measure"):
                # Separate processes: the measurement sees a restarted relay, not the build's heap.
                out = subprocess.run([sys.executable, __file__, "--child", step, tmp, "--size", str(size),
                                      "--messages", str(args.messages), "--seed", str(args.seed)]
                                     + (["--corpus", str(args.corpus.resolve())] if args.corpus else []),
                                     capture_output=True, text=True, check=True)
                r |= json.loads(out.stdout.strip().splitlines()[-1])
        print(f"| {r['entries']} | {r['build_s']} | {r['warm_load_s']} | {r['p50_ms']} | {r['p99_ms']} "
              f"| {r['rss_mb']} | {r['found']} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

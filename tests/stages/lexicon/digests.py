"""Digests of everything the lexicon stage decides, to show that a speed change alters no result.

Each run is reduced to a SHA-256 over its outputs (entities with full-precision scores,
corrections, text, the gate's decision and the lexicon trace: candidates, blocked guards,
counts):

- ``workshop``: the chain of examples/workshop/relay.yaml over every line of its corpus.jsonl;
- ``generated``: a 10k-entry invented lexicon and 300 generated 10-best messages
  (relay/workbench/synthetic.py), with a 50-candidate trace so small scoring changes show.

tests/stages/lexicon/test_outputs_digest.py compares them with lexicon_outputs.json beside
this file. When a change is meant to alter results, record them again from the repository root:

    python -m tests.stages.lexicon.digests            # compare, one line per run
    python -m tests.stages.lexicon.digests --record   # write lexicon_outputs.json
"""

from __future__ import annotations

import argparse
import hashlib
import json
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

from relay.core.config import build_chain, load_config
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, TraceEntry, Utterance
from relay.workbench.corpus import read_corpus
from relay.workbench.synthetic import make_lexicon, make_messages
from stages.lexicon.stage import LexiconSettings, LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from tests.paths import ROOT, TESTS, WORKSHOP

RECORDED = TESTS / "stages" / "lexicon" / "lexicon_outputs.json"


def describe(utterance: Utterance) -> dict[str, Any]:
    lexicon = [t.scores for t in utterance.trace if t.stage == "lexicon"]
    return {"entities": [[e.id, e.type, e.name, list(e.span), e.heard, repr(e.score)] for e in utterance.entities],
            "corrections": [[c.stage, c.before, c.after, repr(c.score), c.reason] for c in utterance.corrections],
            "text": utterance.text, "decision": str(utterance.decision), "lexicon": lexicon}


def digest(rows: Iterable[dict[str, Any]]) -> tuple[str, int]:
    """(SHA-256 hex digest, number of rows)."""
    h = hashlib.sha256()
    count = 0
    for row in rows:
        # Traces name files (a carrier line's file:line); where the checkout lives must not count.
        h.update(json.dumps(row, sort_keys=True, default=repr).replace(str(ROOT), "<repo>").encode())
        count += 1
    return h.hexdigest(), count


def workshop() -> Iterable[dict[str, Any]]:
    with tempfile.TemporaryDirectory() as cache:
        chain = build_chain(load_config(WORKSHOP / "relay.yaml"))
        # A cache of its own: the run neither writes into the checkout nor reads a compiled
        # lexicon that an older build left in examples/workshop/.rehear-cache.
        for stage in chain.stages:
            if hasattr(stage, "context"):
                stage.context = StageContext(base_dir=stage.context.base_dir, cache_dir=Path(cache))
        chain.load()
        for item in read_corpus(WORKSHOP / "corpus.jsonl"):
            yield {"id": item.id} | describe(chain.process(item.utterance()))


def generated(size: int = 10_000, count: int = 300, seed: int = 7) -> Iterable[dict[str, Any]]:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        names = make_lexicon(size, folder / "lexicon.csv", seed)
        context = StageContext(base_dir=folder, cache_dir=folder / "cache")
        stage = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv"), trace_top=50), context=context)
        stage.load()
        normalize = NormalizeStage(NormalizeSettings(prefer="rank"), context=context)
        for number, (_, texts) in enumerate(make_messages(names, count, seed + 1)):
            nbest = [Hypothesis(t, r, {}) for r, t in enumerate(texts)]
            utterance = normalize.process(Utterance(f"g{number}", "bench", None, {}, nbest))
            utterance.trace.append(TraceEntry("lexicon"))
            yield {"id": number} | describe(stage.process(utterance))


RUNS: dict[str, Callable[[], Iterable[dict[str, Any]]]] = {"workshop": workshop, "generated": generated}


def recorded() -> dict[str, tuple[str, int]]:
    """The recorded digests, by run name."""
    return {name: (str(value[0]), int(value[1])) for name, value in json.loads(RECORDED.read_text()).items()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tests.stages.lexicon.digests",
                                     description="Compare the lexicon stage's output digests with the "
                                                 f"recorded ones, or record them again ({RECORDED.name}).")
    parser.add_argument("--record", action="store_true", help=f"write the digests to {RECORDED}")
    args = parser.parse_args(argv)
    found = {name: digest(run()) for name, run in RUNS.items()}
    if args.record:
        RECORDED.write_text(json.dumps(found, indent=1) + "\n")
        print(f"recorded in {RECORDED}")
    expected = {} if args.record else recorded()
    same = True
    for name, (value, rows) in found.items():
        status = "recorded" if args.record else "same" if expected.get(name) == (value, rows) else "DIFFERENT"
        same &= status != "DIFFERENT"
        print(f"{name}: {status} ({rows} messages, {value[:16]})")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())

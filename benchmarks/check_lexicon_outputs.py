"""Digest of everything the lexicon stage decides, to show a speed change leaves results alone.

Two runs, each reduced to a SHA-256 of its outputs (entities with full-precision scores,
corrections, chosen text, the gate's decision and the lexicon trace: candidates, blocked
guards, counts):

- `workshop`: the chain of examples/workshop/relay.yaml over every line of corpus.jsonl;
- `generated`: a 10k-entry invented lexicon (benchmarks/bench_lexicon.py) and 300 generated
  10-best messages, with a 50-candidate trace so small scoring changes show.

    python benchmarks/check_lexicon_outputs.py --record digests.json   # before a change
    python benchmarks/check_lexicon_outputs.py --check digests.json    # after: exit 1 on a difference

benchmarks/lexicon_outputs.json holds the digests of the current results (same dev
environment: numpy, rapidfuzz and kenlm versions can move the last digit of a score);
record it again when a change is meant to alter results.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
import tempfile
from collections.abc import Iterable
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.bench_lexicon import make_lexicon, make_messages
from relay.core.config import build_chain, load_config
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, TraceEntry, Utterance
from relay.workbench.corpus import read_corpus

_ROOT = Path(__file__).resolve().parent.parent


def describe(utterance: Utterance) -> dict[str, Any]:
    lexicon = [t.scores for t in utterance.trace if t.stage == "lexicon"]
    return {"entities": [[e.id, e.type, e.name, list(e.span), e.heard, repr(e.score)] for e in utterance.entities],
            "corrections": [[c.stage, c.before, c.after, repr(c.score), c.reason] for c in utterance.corrections],
            "text": utterance.text, "decision": str(utterance.decision), "lexicon": lexicon}


def digest(rows: Iterable[dict[str, Any]]) -> tuple[str, int]:
    h = hashlib.sha256()
    count = 0
    for row in rows:
        # Traces name files (a carrier line's file:line); where the checkout lives must not count.
        h.update(json.dumps(row, sort_keys=True, default=repr).replace(str(_ROOT), "<repo>").encode())
        count += 1
    return h.hexdigest(), count


def workshop() -> Iterable[dict[str, Any]]:
    folder = _ROOT / "examples" / "workshop"
    with tempfile.TemporaryDirectory() as cache:
        loaded = load_config(folder / "relay.yaml")
        chain = build_chain(loaded)
        for stage in chain.stages:
            if hasattr(stage, "context"):
                stage.context = StageContext(base_dir=stage.context.base_dir, cache_dir=Path(cache))
        chain.load()
        for item in read_corpus(folder / "corpus.jsonl"):
            yield {"id": item.id} | describe(chain.process(item.utterance()))


def generated(size: int = 10_000, count: int = 300, seed: int = 7) -> Iterable[dict[str, Any]]:
    from stages.lexicon.settings import LexiconSettings
    from stages.lexicon.stage import LexiconStage
    from stages.normalize.stage import NormalizeSettings, NormalizeStage

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


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--record", type=Path, help="write the digests to this JSON file")
    group.add_argument("--check", type=Path, help="compare with the digests in this JSON file")
    args = parser.parse_args(argv)
    found = {name: digest(run()) for name, run in (("workshop", workshop), ("generated", generated))}
    if args.record:
        args.record.write_text(json.dumps(found, indent=1) + "\n")
        print(json.dumps(found, indent=1))
        return 0
    expected = {k: tuple(v) for k, v in json.loads(args.check.read_text()).items()}
    same = True
    for name, value in found.items():
        ok = expected.get(name) == value
        same &= ok
        print(f"{name}: {'same' if ok else 'DIFFERENT'} ({value[1]} messages, {value[0][:16]})")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())

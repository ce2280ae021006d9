"""What the lexicon stage's corrections do to the words: fixed, broken, or changed wrong to wrong.

For every utterance the chain's chosen hypothesis before the lexicon rewrote it (``top``) and
the finished text are each aligned with the reference (rapidfuzz word opcodes). A reference
word matched before and not after was broken by a correction; one matched after and not
before was fixed. The entity mentions the stage misses, by cause (not retrieved at all, or the
guard that stopped them), are counted by ``benchmarks/person_misses.py --type all``.

    python benchmarks/corrections.py                    # every corpus, default chain
    python benchmarks/corrections.py --set lexicon.general.min_score=0.7
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path
from typing import Any

from rapidfuzz.distance import Levenshtein

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run as a script from anywhere

from benchmarks.matrix import CORPORA, ROOT, SCENARIOS, chain_for, parse_sets, part_of
from relay.workbench.corpus import read_corpus
from relay.workbench.evaluate import Outcome, run_corpus
from stages.normalize.tokens import tokenize


def matched(reference: list[str], words: list[str]) -> set[int]:
    """Reference positions that the words hold exactly, under a minimum-edit alignment."""
    out: set[int] = set()
    for op in Levenshtein.opcodes(reference, words):
        if op.tag == "equal":
            out.update(range(op.src_start, op.src_end))
    return out


def tally(outcomes: list[Outcome]) -> dict[str, Any]:
    fixed = broken = corrected = 0
    harmful = []
    for o in outcomes:
        if not o.corrections:
            continue
        corrected += 1
        reference = tokenize(o.reference)
        before, after = matched(reference, tokenize(o.top)), matched(reference, tokenize(o.text))
        fixed += len(after - before)
        broken += len(before - after)
        if before - after:
            harmful.append(f"{o.id}: {o.top!r} -> {o.text!r} (said {o.reference!r})")
    words = sum(len(tokenize(o.reference)) for o in outcomes)
    return {"utterances": len(outcomes), "corrected": corrected, "words": words, "fixed": fixed,
            "broken": broken, "harmful": harmful}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--set", action="append", default=[], metavar="STAGE.SETTING=JSON")
    parser.add_argument("--scenario", choices=SCENARIOS, action="append")
    parser.add_argument("--recogniser", choices=tuple(CORPORA), action="append")
    parser.add_argument("--show", type=int, default=0, help="print this many utterances where a correction broke words")
    args = parser.parse_args(argv)
    print(f"{'scenario':9} {'recogniser':12} {'part':5} {'utts':>5} {'corr':>5} {'fixed':>6} {'broken':>6} {'net':>6}")
    with tempfile.TemporaryDirectory() as tmp:
        for scenario in args.scenario or SCENARIOS:
            folder = ROOT / "examples" / scenario
            chain = chain_for(folder, parse_sets(args.set), Path(tmp))
            for recogniser in args.recogniser or tuple(CORPORA):
                items = [i for name in CORPORA[recogniser] if (folder / name).exists() for i in read_corpus(folder / name)]
                parts: dict[str, list[Outcome]] = {}
                for item, outcome in zip(items, run_corpus(chain, items)):
                    parts.setdefault(part_of(item), []).append(outcome)
                for part in sorted(parts, key=lambda p: (p != "main", p)):
                    t = tally(parts[part])
                    print(f"{scenario:9} {recogniser:12} {part:5} {t['utterances']:5d} {t['corrected']:5d} "
                          f"{t['fixed']:6d} {t['broken']:6d} {t['fixed'] - t['broken']:+6d}")
                    for line in t["harmful"][: args.show if part == "main" else 0]:
                        print("   ", line)
    return 0


if __name__ == "__main__":
    sys.exit(main())

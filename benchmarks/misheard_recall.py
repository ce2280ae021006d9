"""Entity recall split by how the recogniser carried each mention, for a configured chain.

Every reference entity mention (FORMATS section 5) falls in one group: its words stand intact
in the first hypothesis ("heard right"), only in a deeper hypothesis ("deeper in the list"),
or in no hypothesis at all ("misheard everywhere"). Recall in the last two groups is what the
phonetic lexicon stage adds; the first group shows it keeps what was already right. Also
counts the utterances whose first hypothesis was already word for word right and whether the
chain left their text alone.

    python benchmarks/misheard_recall.py examples/workshop/corpus.jsonl \
        --config examples/workshop/relay.yaml --where 'snr_db!=15'
"""

from __future__ import annotations

import argparse
import sys
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.corpus_chain import add_corpus_arguments, items_and_chain
from relay.workbench.evaluate import run_corpus
from stages.normalize.tokens import tokenize

GROUPS = ("heard right", "deeper in the list", "misheard everywhere")


def _padded(text: str) -> str:
    return " " + " ".join(tokenize(text)) + " "


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_corpus_arguments(parser)
    args = parser.parse_args(argv)
    items, chain = items_and_chain(args)
    outcomes = {o.id: o for o in run_corpus(chain, items, progress=True)}

    hits: Counter[tuple[str, str]] = Counter()  # (group, type) -> mentions found
    totals: Counter[tuple[str, str]] = Counter()
    for item in items:
        outcome = outcomes[item.id]
        hypotheses = [_padded(h.text) for h in item.utterance().nbest]
        for entity_id, text in item.entity_texts:
            words = _padded(text)
            group = GROUPS[0] if words in hypotheses[0] else GROUPS[1] if any(
                words in h for h in hypotheses[1:]) else GROUPS[2]
            kind = outcome.found.get(entity_id) or entity_id.split(".", 1)[0]
            totals[group, kind] += 1
            hits[group, kind] += entity_id in outcome.found

    kinds = sorted({kind for _, kind in totals})
    print(f"{len(items)} utterances, {sum(totals.values())} entity mentions, chain: {' -> '.join(chain.names)}")
    print(f"{'group':22s} {'found':>11s}  " + "  ".join(f"{k:>11s}" for k in kinds))
    for group in (*GROUPS, "not heard right"):
        members = GROUPS[1:] if group == "not heard right" else (group,)
        found = sum(hits[g, k] for g in members for k in kinds)
        total = sum(totals[g, k] for g in members for k in kinds)
        cells = "  ".join(f"{sum(hits[g, k] for g in members):>4d}/{sum(totals[g, k] for g in members):<4d}  "
                          for k in kinds)
        print(f"{group:22s} {found:>4d}/{total:<4d} {found / max(1, total):4.0%}  {cells}")
    right = [o for o in outcomes.values() if o.errors_first == 0]
    print(f"first hypothesis already right: {len(right)} utterances; text left unchanged in "
          f"{sum(o.errors_relay == 0 for o in right)}, entity set right in {sum(o.entity_ok for o in right)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

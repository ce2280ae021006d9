"""Summarise a labelled corpus: counts, first-hypothesis and oracle WER, misheard terms.

WER is computed with jiwer (corpus level: all errors over all reference words).
The oracle picks, per utterance, the N-best entry with the fewest word errors.

    python -m examples.workshop.corpus_report examples/workshop/corpus.jsonl
"""

from __future__ import annotations

import argparse
import json
import sys
from collections import Counter, defaultdict
from pathlib import Path

import jiwer

from examples.workshop.scenario import HERE


def errors(reference: str, hypothesis: str) -> int:
    if not hypothesis.strip():
        return len(reference.split())
    out = jiwer.process_words(reference, hypothesis)
    return out.substitutions + out.deletions + out.insertions


def load(path: Path) -> list[dict]:
    rows = []
    for line_no, line in enumerate(
        path.read_text(encoding="utf-8").splitlines(), start=1
    ):
        try:
            rows.append(json.loads(line))
        except json.JSONDecodeError as exc:
            raise SystemExit(f"{path}:{line_no}: not JSON ({exc})") from exc
    return rows


def wer_table(rows: list[dict], key) -> dict[str, tuple[int, float, float]]:
    groups: dict[str, list[dict]] = defaultdict(list)
    for row in rows:
        groups[str(key(row))].append(row)
    table = {}
    for name, members in sorted(groups.items()):
        words = sum(len(r["reference"].split()) for r in members)
        first = sum(
            errors(r["reference"], r["message"]["nbest"][0]["text"]) for r in members
        )
        oracle = sum(
            min(errors(r["reference"], h["text"]) for h in r["message"]["nbest"])
            for r in members
        )
        table[name] = (len(members), first / words, oracle / words)
    return table


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Counts, WER and misheard lexicon terms of a labelled corpus."
    )
    parser.add_argument("corpus", type=Path, nargs="?", default=HERE / "corpus.jsonl")
    parser.add_argument(
        "--examples", type=int, default=10, help="misheard-term examples to print"
    )
    args = parser.parse_args(argv)
    rows = load(args.corpus)
    print(f"{len(rows)} utterances")
    print(
        "voice x snr:",
        dict(Counter((r["tags"]["voice"], r["tags"]["snr_db"]) for r in rows)),
    )
    print(
        "entities per utterance:",
        dict(sorted(Counter(len(r["entities"]) for r in rows).items())),
    )
    print(
        "N-best length:",
        dict(sorted(Counter(len(r["message"]["nbest"]) for r in rows).items())),
    )
    for title, key in [
        ("all", lambda r: "all"),
        ("snr_db", lambda r: r["tags"]["snr_db"]),
        ("voice", lambda r: r["tags"]["voice"]),
        ("split", lambda r: r["tags"]["split"]),
    ]:
        for name, (n, first, oracle) in wer_table(rows, key).items():
            print(
                f"{title:7s} {name:6s} n={n:4d}  first WER {first:6.1%}  oracle WER {oracle:6.1%}"
            )
    heard: Counter[bool] = Counter()
    shown = 0
    for row in rows:
        said_first = f" {row['message']['nbest'][0]['text']} "
        for ent in row["entities"]:
            hit = f" {ent['text']} " in said_first
            heard[hit] += 1
            if not hit and shown < args.examples:
                shown += 1
                print(
                    f"  {ent['id']:32s} said: {row['reference']!r}\n  {'':32s} heard: {said_first.strip()!r}"
                )
    total = sum(heard.values())
    print(
        f"entity words intact in first hypothesis: {heard[True]}/{total} ({heard[True] / max(total, 1):.1%})"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())

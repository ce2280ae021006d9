"""Accuracy of one chain setting on every recorded corpus: both scenarios, both recognisers, by part.

The default chain is built from each scenario's own files (lexicon, in-domain text, speakers),
exactly as `rehear eval CORPUS --lexicon L --train T --speakers S` builds it, with optional
stage-setting overrides; nothing is fitted here, so every number is an untuned-defaults number
on data the defaults were not chosen on, unless the defaults were chosen on that scenario (say so
when you report it).

    python benchmarks/matrix.py
    python benchmarks/matrix.py --set lexicon.general.min_score=0.7 --set gate.accept_confidence=0.5
    python benchmarks/matrix.py --json out.json --scenario boatyard --recogniser whisper
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

from relay.core.chain import Chain
from relay.workbench.corpus import CorpusItem, read_corpus
from relay.workbench.defaults import folder_config, load_chain
from relay.workbench.evaluate import Outcome, run_corpus, summarize
from relay.workbench.variants import with_overrides

ROOT = Path(__file__).resolve().parents[1]
SCENARIOS = ("workshop", "boatyard")
CORPORA = {"pocketsphinx": ("corpus.jsonl", "corpus-10db-pocketsphinx.jsonl"),
           "whisper": ("corpus-whisper.jsonl", "corpus-10db-whisper.jsonl")}


def part_of(item: CorpusItem) -> str:
    """clean + 20-25 dB ("main"), 15 dB, or 10 dB."""
    snr = item.tags.get("snr_db")
    return "main" if snr in (None, 20, 25) else f"{snr}dB"


def parse_sets(pairs: list[str]) -> dict[str, dict[str, Any]]:
    """``stage.setting=JSON`` pairs as per-stage overrides (dotted setting names allowed)."""
    out: dict[str, dict[str, Any]] = {}
    for pair in pairs:
        key, _, value = pair.partition("=")
        stage, _, setting = key.partition(".")
        try:
            parsed = json.loads(value)
        except json.JSONDecodeError:
            parsed = value
        out.setdefault(stage, {})[setting] = parsed
    return out


def chain_for(folder: Path, overrides: dict[str, dict[str, Any]], cache: Path) -> Chain:
    return load_chain(with_overrides(folder_config(folder, cache_dir=cache), overrides), base_dir=folder)


def row(outcomes: list[Outcome]) -> dict[str, Any]:
    s = summarize(outcomes)
    return {"n": s.utterances, "wer_first": s.wer_first, "wer_oracle": s.wer_oracle, "wer": s.wer_relay,
            "recall": s.entity_recall, "precision": s.entity_precision, "asked": s.clarify_rate,
            "wrong_accepts": s.wrong_accept_rate,
            "wrong_accepts_of_all": sum(1 for o in outcomes if o.decision == "accept" and not o.entity_ok)
            / max(1, len(outcomes))}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--set", action="append", default=[], metavar="STAGE.SETTING=JSON")
    parser.add_argument("--scenario", choices=SCENARIOS, action="append")
    parser.add_argument("--recogniser", choices=tuple(CORPORA), action="append")
    parser.add_argument("--json", type=Path, help="also write the rows as JSON")
    args = parser.parse_args(argv)
    overrides = parse_sets(args.set)
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory() as tmp:
        for scenario in args.scenario or SCENARIOS:
            folder = ROOT / "examples" / scenario
            chain = chain_for(folder, overrides, Path(tmp))
            for recogniser in args.recogniser or tuple(CORPORA):
                items = [i for name in CORPORA[recogniser] if (folder / name).exists()
                         for i in read_corpus(folder / name)]
                outcomes = run_corpus(chain, items)
                parts: dict[str, list[Outcome]] = {}
                for item, outcome in zip(items, outcomes):
                    parts.setdefault(part_of(item), []).append(outcome)
                for part in sorted(parts, key=lambda p: (p != "main", p)):
                    rows.append({"scenario": scenario, "recogniser": recogniser, "part": part} | row(parts[part]))
    header = f"{'scenario':9} {'recogniser':12} {'part':5} {'n':>4} {'1st':>6} {'oracle':>6} {'rehear':>6} " \
             f"{'recall':>6} {'prec':>6} {'asked':>6} {'wrongA':>6} {'wA/all':>6}"
    print(header)
    for r in rows:
        print(f"{r['scenario']:9} {r['recogniser']:12} {r['part']:5} {r['n']:4d} {r['wer_first']:6.1%} "
              f"{r['wer_oracle']:6.1%} {r['wer']:6.1%} {r['recall']:6.3f} {r['precision']:6.3f} {r['asked']:6.1%} "
              f"{r['wrong_accepts']:6.1%} {r['wrong_accepts_of_all']:6.1%}")
    if args.json is not None:
        args.json.write_text(json.dumps({"overrides": overrides, "rows": rows}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Fit the gate's default confidence on the shipped example corpora and write it as package data.

    python scripts/fit_default_gate.py            # writes stages/gate/data/default_confidence.json

Every labelled corpus of every scenario under examples/ (both recognisers, every noise part) is
run through that scenario's default chain; the recipe (relay.workbench.gate_model) fits the
logistic confidence on the features that mean the same in any domain. How well the recipe holds
on a scenario it was not fitted on is measured by benchmarks/gate_transfer.py.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from datetime import date
from pathlib import Path

from relay.workbench.gate_model import fit_default, record

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "stages" / "gate" / "data" / "default_confidence.json"
CORPORA = ("corpus.jsonl", "corpus-whisper.jsonl", "corpus-10db-pocketsphinx.jsonl", "corpus-10db-whisper.jsonl")


# The scenarios the defaults are fitted and chosen on. examples/glasshouse is held out: nothing is
# fitted or chosen on it (benchmarks/held_out.py judges the defaults there).
FITTED_ON = ("boatyard", "workshop")


def scenarios() -> list[Path]:
    return [ROOT / "examples" / name for name in FITTED_ON]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-o", "--output", type=Path, default=OUT)
    args = parser.parse_args(argv)
    folders = scenarios()
    with tempfile.TemporaryDirectory() as cache:
        rows = record(folders, CORPORA, cache_dir=Path(cache))
    model = fit_default(rows)
    right = sum(r.right for r in rows)
    document = {
        "about": "the gate's default confidence (scripts/fit_default_gate.py): probability that a result's "
                 "entities are right, fitted on the example scenarios' labelled corpora",
        "fitted_on": {"scenarios": [f.name for f in folders], "corpora": list(CORPORA), "utterances": len(rows),
                      "right": right, "date": date.today().isoformat()},
        "model": model.model_dump(),
    }
    args.output.parent.mkdir(parents=True, exist_ok=True)
    args.output.write_text(json.dumps(document, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {args.output}: {len(model.features)} features, fitted on {len(rows)} utterances ({right} right)")
    return 0


if __name__ == "__main__":
    sys.exit(main())

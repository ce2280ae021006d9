"""The README's results table: both scenarios x both recognisers, measured only where nothing was fitted.

For each scenario and recogniser, on the clean + 20-25 dB part (and the noise parts):

- **defaults**: the default chain built from the scenario's own files, untuned; the gate's
  confidence made by the shipped recipe (relay.workbench.gate_model) fitted on the *other*
  scenario only, so no gate number here comes from data its model was fitted on (the shipped
  model itself is fitted on both);
- **in-scenario**: `tune`'s 5-fold cross-validation on the part, repeated on 5 random splits
  and pooled (`--repeats`; every number from folds the choice was not fitted on; one split's
  wrong-accept rate moves by a point or more with the split alone);
- **cross-scenario**: the settings `tune` chose on the *other* scenario (same recogniser, whole
  part) applied to this one, with this scenario's files.

    python benchmarks/results.py [--markdown] [--json out.json] [--max-settings 24] [--repeats 5]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

from relay.workbench.corpus import CorpusItem, read_corpus
from relay.workbench.defaults import folder_config, load_chain
from relay.workbench.evaluate import Summary, run_corpus, summarize
from relay.workbench.gate_model import fit_default, record
from relay.workbench.tune import tune
from relay.workbench.variants import config_from_dict, with_overrides

ROOT = Path(__file__).resolve().parents[1]
EVERY_CORPUS = ("corpus.jsonl", "corpus-whisper.jsonl", "corpus-10db-pocketsphinx.jsonl", "corpus-10db-whisper.jsonl")
SCENARIOS = ("workshop", "boatyard")
CORPORA = {"whisper": ("corpus-whisper.jsonl", "corpus-10db-whisper.jsonl"),
           "pocketsphinx": ("corpus.jsonl", "corpus-10db-pocketsphinx.jsonl")}


def _run(raw: dict[str, Any], folder: Path, items: list[CorpusItem]) -> Summary:
    return summarize(run_corpus(load_chain(raw, base_dir=folder), items))


def summary_row(summary: Summary) -> dict[str, Any]:
    return {"n": summary.utterances, "wer_first": summary.wer_first, "wer_oracle": summary.wer_oracle,
            "wer": summary.wer_relay, "recall": summary.entity_recall, "precision": summary.entity_precision,
            "wrong_accepts": summary.wrong_accept_rate, "asked_doubt": summary.asked_doubt,
            "asked_policy": summary.asked_policy, "wrong_of_all": summary.wrong_accepts / max(1, summary.utterances),
            "ece": summary.quality.get("ece")}


TABLE_HEAD = ("| scenario | recogniser | settings | part | n | WER first / oracle / rehear | recall / precision "
              "| wrong accepts (of all) | asked back: doubt + policy")


def table_row(r: dict[str, Any]) -> str:
    """A row of the results table, without its closing bar (other tables add columns)."""
    return (f"| {r['scenario']} | {r['recogniser']} | {r['how']} | {r['part']} | {r['n']} | "
            f"{r['wer_first']:.1%} / {r['wer_oracle']:.1%} / {r['wer']:.1%} | {r['recall']:.3f} / {r['precision']:.3f} "
            f"| {r['wrong_accepts']:.1%} ({r['wrong_of_all']:.1%}) | {r['asked_doubt']:.1%} + {r['asked_policy']:.1%}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-settings", type=int, default=24)
    parser.add_argument("--max-clarify", type=float, default=0.3)
    parser.add_argument("--repeats", type=int, default=5, help="cross-validation splits pooled in-scenario")
    parser.add_argument("--json", type=Path)
    parser.add_argument("--recogniser", choices=tuple(CORPORA), action="append")
    args = parser.parse_args(argv)
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory() as tmp:
        cache = Path(tmp)
        # The gate's default confidence for each scenario, fitted on the other one.
        held_out_gate = {}
        for scenario in SCENARIOS:
            other = next(s for s in SCENARIOS if s != scenario)
            model = fit_default(record([ROOT / "examples" / other], EVERY_CORPUS, cache_dir=cache))
            held_out_gate[scenario] = {"gate": {"confidence": model.model_dump()}}
        for recogniser in args.recogniser or tuple(CORPORA):
            main_name, noise_name = CORPORA[recogniser]
            data: dict[str, tuple[list[CorpusItem], list[CorpusItem]]] = {}
            tuned: dict[str, dict[str, Any]] = {}
            for scenario in SCENARIOS:
                folder = ROOT / "examples" / scenario
                every = read_corpus(folder / main_name)
                main_part = [i for i in every if i.tags.get("snr_db") in (None, 20, 25)]
                noise = [i for i in every if i.tags.get("snr_db") == 15] + read_corpus(folder / noise_name)
                data[scenario] = (main_part, noise)
                raw = folder_config(folder, cache_dir=cache)
                loaded = config_from_dict(raw, base_dir=folder)
                result = tune(loaded, main_part, written=raw, max_clarify=args.max_clarify,
                              max_settings=args.max_settings, repeats=args.repeats)
                tuned[scenario] = result.config
                rows.append({"scenario": scenario, "recogniser": recogniser, "how": f"in-scenario (5-fold CV x {args.repeats})",
                             "part": "clean+20-25dB"} | summary_row(result.held_out))
                defaults = with_overrides(raw, held_out_gate[scenario])
                for part, items in (("clean+20-25dB", main_part), ("noise (10 dB; pocketsphinx 15 dB too)", noise)):
                    rows.append({"scenario": scenario, "recogniser": recogniser, "how": "untuned defaults",
                                 "part": part} | summary_row(_run(defaults, folder, items)))
            for scenario in SCENARIOS:
                other = next(s for s in SCENARIOS if s != scenario)
                folder = ROOT / "examples" / scenario
                crossed = folder_config(folder, cache_dir=cache) | {"stages": tuned[other]["stages"]}
                for part, items in zip(("clean+20-25dB", "noise (10 dB; pocketsphinx 15 dB too)"), data[scenario]):
                    rows.append({"scenario": scenario, "recogniser": recogniser, "how": f"tuned on {other}",
                                 "part": part} | summary_row(_run(crossed, folder, items)))
    print(TABLE_HEAD + " |\n" + "|---" * 9 + "|")
    for r in rows:
        print(table_row(r) + " |")
    if args.json is not None:
        args.json.write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""rehear on a scenario that no default was fitted or chosen on: what a new trade gets out of the box.

The example scenarios the defaults were chosen on (the workshop and the boatyard) stay out of
this measure; a held-out scenario (examples/glasshouse) is judged with

- **defaults**: the default chain built from its own files, untuned, the gate's shipped
  confidence (fitted on the other scenarios' corpora only) - what a new user runs first;
- **tuned on S**: the settings `tune` chooses on scenario S's part (same recogniser), applied
  with the held-out scenario's files;
- **in-scenario**: `tune`'s own 5-fold cross-validation on the held-out part (`--repeats`
  splits pooled): what the user gets after labelling a corpus of their own.

For each: WER (first hypothesis, oracle, rehear), entity recall and precision, wrong accepts,
asked back from doubt and by policy, the confidence's calibration error, and the right words a
correction broke. Noise parts (10 dB) are reported apart, as speech nobody could act on.

    python benchmarks/held_out.py [--scenario glasshouse] [--recogniser whisper] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run as a script from anywhere

from benchmarks.corrections import tally
from benchmarks.gate_transfer import CORPORA as EVERY_CORPUS
from benchmarks.gate_transfer import judged, parts, print_table
from benchmarks.results import CORPORA, SCENARIOS, TABLE_HEAD, summary_row, table_row
from relay.workbench.corpus import CorpusItem, read_corpus
from relay.workbench.defaults import folder_config, load_chain
from relay.workbench.evaluate import run_corpus, summarize
from relay.workbench.gate_model import record
from relay.workbench.tune import tune
from relay.workbench.variants import config_from_dict
from stages.gate.settings import default_confidence

ROOT = Path(__file__).resolve().parents[1]
HELD_OUT = ("glasshouse",)


def _main_and_noise(folder: Path, recogniser: str) -> tuple[list[CorpusItem], list[CorpusItem]]:
    main_name, noise_name = CORPORA[recogniser]
    every = read_corpus(folder / main_name)
    noise = [i for i in every if i.tags.get("snr_db") == 15]
    if (folder / noise_name).exists():
        noise += read_corpus(folder / noise_name)
    return [i for i in every if i.tags.get("snr_db") in (None, 20, 25)], noise


def _judge(raw: dict[str, Any], folder: Path, items: list[CorpusItem]) -> dict[str, Any]:
    outcomes = run_corpus(load_chain(raw, base_dir=folder), items)
    return summary_row(summarize(outcomes)) | {"broken": tally(outcomes)["broken"]}


def shipped_gate(folder: Path, cache: Path) -> list[dict[str, Any]]:
    """The shipped confidence on the scenario's recorded results, judged as
    benchmarks/gate_transfer.py judges the recipe, at the default threshold."""
    model = default_confidence()
    return [{"fitted_on": "shipped", "judged_on": folder.name, "part": part} | judged(model, subset, accept=0.8)
            for part, subset in parts(record([folder], EVERY_CORPUS, cache_dir=cache)).items() if subset]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", action="append", help=f"held-out scenario folder name (default {HELD_OUT[0]})")
    parser.add_argument("--recogniser", choices=tuple(CORPORA), action="append")
    parser.add_argument("--max-settings", type=int, default=24)
    parser.add_argument("--max-clarify", type=float, default=0.3)
    parser.add_argument("--repeats", type=int, default=5, help="cross-validation splits pooled in-scenario")
    parser.add_argument("--json", type=Path)
    args = parser.parse_args(argv)
    rows: list[dict[str, Any]] = []
    gate: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory() as tmp:
        cache = Path(tmp)
        for scenario in args.scenario or HELD_OUT:
            gate += shipped_gate(ROOT / "examples" / scenario, cache)
        for recogniser in args.recogniser or tuple(CORPORA):
            chosen = {}
            for source in SCENARIOS:
                folder = ROOT / "examples" / source
                raw = folder_config(folder, cache_dir=cache)
                main_part, _ = _main_and_noise(folder, recogniser)
                chosen[source] = tune(config_from_dict(raw, base_dir=folder), main_part, written=raw,
                                      max_clarify=args.max_clarify, max_settings=args.max_settings).config
            for scenario in args.scenario or HELD_OUT:
                folder = ROOT / "examples" / scenario
                raw = folder_config(folder, cache_dir=cache)
                main_part, noise = _main_and_noise(folder, recogniser)
                parts = (("clean+20 dB", main_part), ("10 dB", noise))
                for part, items in parts:
                    if items:
                        rows.append({"scenario": scenario, "recogniser": recogniser, "how": "untuned defaults",
                                     "part": part} | _judge(raw, folder, items))
                for source, config in chosen.items():
                    for part, items in parts:
                        if items:
                            rows.append({"scenario": scenario, "recogniser": recogniser, "how": f"tuned on {source}",
                                         "part": part} | _judge(raw | {"stages": config["stages"]}, folder, items))
                result = tune(config_from_dict(raw, base_dir=folder), main_part, written=raw,
                              max_clarify=args.max_clarify, max_settings=args.max_settings, repeats=args.repeats)
                rows.append({"scenario": scenario, "recogniser": recogniser,
                             "how": f"in-scenario (5-fold CV x {args.repeats})", "part": "clean+20 dB"}
                            | summary_row(result.held_out) | {"broken": None})
    print(TABLE_HEAD + " | ECE | words broken |\n" + "|---" * 11 + "|")
    for r in rows:
        ece = "-" if r["ece"] is None else f"{r['ece']:.3f}"
        broken = "-" if r["broken"] is None else str(r["broken"])
        print(f"{table_row(r)} | {ece} | {broken} |")
    print("\nThe shipped confidence (fitted on the other scenarios) at accept 0.8:\n")
    print_table(gate)
    if args.json is not None:
        args.json.write_text(json.dumps({"chain": rows, "gate": gate}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())

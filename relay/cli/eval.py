"""`rehear eval CORPUS`: run a labelled corpus through the relay's chain and report accuracy,
decisions and latency."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from typing import Any

import orjson

from relay.cli.common import delegate, output_file, require_extra, show_progress
from relay.cli.corpus_args import add_corpus_arguments, chosen_config, selected_items
from relay.core.config import build_chain
from relay.core.stage import deciding_stage
from relay.workbench.evaluate import Outcome, format_table, result_line, run_corpus, summarize
from relay.workbench.written import write_atomically
from stages.gate.confidence import ConfidenceModel
from stages.gate.stage import missing_conf_advice

__all__ = ["add_parser", "run"]

DESCRIPTION = """\
Evaluate the relay on a labelled corpus. Each line's recogniser message is parsed and
processed exactly as the live relay would, by the same chain. Prints WER of the first
hypothesis, of the best hypothesis in the list (oracle) and of the relay; entity recall and
precision; the share of each decision; wrong accepts (accepted, but the entity ids differ
from the reference); the share of accepted results with any word error; latency per stage.
"""


def _configure(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    add_corpus_arguments(parser)
    parser.add_argument("--json", type=output_file, metavar="OUT", help="also write the main numbers as JSON (with the "
                        "counts of accepted results and wrong accepts, and the confidence's NCE, ECE and Brier score)")
    parser.add_argument("--results", type=output_file, metavar="OUT.jsonl",
                        help="also write one line per utterance: id, reference, first hypothesis, text sent on, "
                        "entities found and expected, decision, rule, confidence, right")
    parser.add_argument("--report", type=output_file, metavar="OUT.html",
                        help="also write an HTML report with plots (needs the report extra: "
                        "pip install 'rehear[report]')")
    return parser


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser("eval", help="evaluate the chain on a labelled corpus", description=DESCRIPTION,
                                   formatter_class=argparse.RawDescriptionHelpFormatter)
    return _configure(parser)


def _model_of(gate: object) -> ConfidenceModel | None:
    """The deciding stage's confidence model, when it has one (a gate of another class may not)."""
    settings = getattr(gate, "settings", None)
    model = getattr(settings, "model", None)
    return model() if callable(model) else None


def conf_note(outcomes: Sequence[Outcome], model: ConfidenceModel | None, corpus: object) -> str | None:
    """The gate's advice when no message of the corpus gave a recogniser `conf` (missing_conf_advice);
    None when one did, or when the gate was told the recogniser never gives one."""
    features = [o.gate for o in outcomes if o.gate is not None]
    if not features or any(f.asr_no_conf != 1 for f in features):
        return None
    advice = missing_conf_advice(model, f"the messages of {corpus}")
    return None if advice is None else f"note: {advice}"


def run(args: argparse.Namespace) -> int:
    if args.report is not None:
        require_extra("matplotlib", extra="report", feature="--report")
    progress = show_progress(args)
    loaded = chosen_config(args)
    chain = build_chain(loaded, progress=progress)
    items, described = selected_items(args, loaded, chain=chain)  # checked before the chain loads
    chain.load()
    outcomes = run_corpus(chain, items, progress=progress)
    summary = summarize(outcomes)
    print(format_table(summary, title=f"{args.corpus} ({described}), chain: {' -> '.join(chain.names)}"))
    gate = deciding_stage(chain.stages)
    note = conf_note(outcomes, _model_of(gate), args.corpus)
    if note is not None:
        print(note, file=sys.stderr)
    if args.json is not None:
        write_atomically(args.json, orjson.dumps(summary.to_json(), option=orjson.OPT_INDENT_2) + b"\n")
    if args.results is not None:
        write_atomically(args.results, b"".join(orjson.dumps(result_line(o)) + b"\n" for o in outcomes))
    if args.report is not None:
        from relay.workbench.report import ReportHeader, write_report  # matplotlib loads only for a report

        configuration = str(args.config) if args.config else f"the default chain from {args.lexicon}"
        about = ReportHeader(configuration=configuration, config_hash=loaded.hash, corpus=str(args.corpus),
                             selection=described, chain=tuple(chain.names))
        write_report(args.report, outcomes, summary, about=about, confidence_model=_model_of(gate))
    return 0


def main(argv: list[str] | None = None) -> int:
    return delegate("eval", argv)


if __name__ == "__main__":
    sys.exit(main())

"""`rehear eval CORPUS`: run a labelled corpus through the relay's chain and report accuracy,
decisions and latency."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import orjson

from relay.cli.corpus_args import add_corpus_arguments, chosen_config, report_error, selected_items
from relay.core.config import build_chain
from relay.core.errors import RehearError
from relay.core.stage import deciding_stage
from relay.workbench.evaluate import format_table, result_line, run_corpus, summarize
from stages.gate.confidence import ConfidenceModel

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
    parser.add_argument("--json", type=Path, metavar="OUT", help="also write the main numbers as JSON (with the "
                        "counts of accepted results and wrong accepts, and the confidence's NCE, ECE and Brier score)")
    parser.add_argument("--results", type=Path, metavar="OUT.jsonl",
                        help="also write one line per utterance: id, reference, first hypothesis, text sent on, "
                        "entities found and expected, decision, rule, confidence, right")
    parser.add_argument("--report", type=Path, metavar="OUT.html",
                        help="also write an HTML report with plots (needs matplotlib)")
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


def run(args: argparse.Namespace) -> int:
    try:
        loaded = chosen_config(args)
        items, described = selected_items(args, loaded)
        chain = build_chain(loaded, progress=not args.no_progress)
        chain.load()
        outcomes = run_corpus(chain, items, progress=not args.no_progress)
    except RehearError as exc:
        return report_error(exc)
    summary = summarize(outcomes)
    print(format_table(summary, title=f"{args.corpus} ({described}), chain: {' -> '.join(chain.names)}"))
    if args.json is not None:
        args.json.write_bytes(orjson.dumps(summary.to_json(), option=orjson.OPT_INDENT_2) + b"\n")
    if args.results is not None:
        args.results.write_bytes(b"".join(orjson.dumps(result_line(o)) + b"\n" for o in outcomes))
    if args.report is not None:
        from relay.workbench.report import write_report  # matplotlib loads only when a report is asked for

        gate = deciding_stage(chain.stages)
        write_report(args.report, outcomes, summary, title=f"rehear evaluation: {args.corpus.name} ({described})",
                     confidence_model=_model_of(gate))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = _configure(argparse.ArgumentParser(prog="rehear eval", description=DESCRIPTION,
                                                formatter_class=argparse.RawDescriptionHelpFormatter))
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())

"""`rehear bench`: how fast rehear is on this machine (relay.workbench.bench)."""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path
from typing import Any

from relay.core.errors import RehearError
from relay.live.serve import EVENT_LOOPS
from relay.workbench.bench import BenchOptions, format_markdown, format_table, run_bench
from relay.workbench.benchdata import configured, example

__all__ = ["add_parser", "run"]

_RUNNERS = ("thread", "loop", "process")


def _runners(text: str) -> tuple[str, ...]:
    values = tuple(part.strip() for part in text.split(",") if part.strip())
    if not values or any(value not in _RUNNERS for value in values):
        raise argparse.ArgumentTypeError(f"expected one or more of {', '.join(_RUNNERS)} separated by commas, "
                                         f"got {text!r}")
    return values


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "bench",
        help="measure latency, throughput, start-up and memory on this machine",
        description=(
            "Measure rehear on this machine: the chain's and each stage's latency per message in process; "
            "a bare pass-through relay and the relay with the chain, in turns, through a broker it starts "
            "(mosquitto when installed, else an embedded one): throughput, their ratio and the latency the "
            "chain adds; the lexicon stage over generated lexicons of 1k, 10k and 100k entries; start-up "
            "time and memory. Without --config, the workshop example shipped with rehear and its recorded "
            "N-best lists. Takes a few minutes; --quick well under one."
        ),
    )
    parser.add_argument("--config", type=Path, help="relay configuration whose chain to measure (its broker, "
                        "topics and metrics settings are replaced by the bench's)")
    parser.add_argument("--messages", type=Path, help="recogniser messages to send, one JSON object a line "
                        "(a labelled corpus works too); default with --config: 10-best lists generated "
                        "around the configured lexicon's names")
    parser.add_argument("--json", type=Path, metavar="OUT", help="also write the results as JSON")
    parser.add_argument("--markdown", action="store_true", help="also print the results as Markdown table rows")
    parser.add_argument("--quick", action="store_true", help="a short run with few messages and the 1k "
                        "lexicon only: checks that everything works; not numbers to compare")
    parser.add_argument("--runner", type=_runners, default=(), metavar="RUNNER[,RUNNER]",
                        help="limits.chain_runner of the relay measured end to end (thread, loop, process); "
                        "several, comma-separated, are measured in turns, the first one reported as the "
                        "chain (default: the configured one)")
    parser.add_argument("--repeat", type=int, default=2, help="end-to-end rounds (default 2)")
    parser.add_argument("--rate", type=float, default=200.0, help="msg/s of the latency run (default 200)")
    parser.add_argument("--event-loop", choices=EVENT_LOOPS, default="auto",
                        help="event loop of the relays under test (default: uvloop when installed)")
    parser.add_argument("--embedded-broker", action="store_true",
                        help="use the embedded MQTT 3.1.1 broker even when mosquitto is installed")
    parser.add_argument("--no-end-to-end", action="store_true", help="skip the measurements through a broker")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    if args.repeat < 1 or args.rate <= 0:
        print("rehear bench: --repeat must be at least 1 and --rate above 0", file=sys.stderr)
        return 2
    options = BenchOptions(quick=args.quick, runners=args.runner, repeat=args.repeat, rate=args.rate,
                           event_loop=args.event_loop, embedded=args.embedded_broker,
                           end_to_end=not args.no_end_to_end)
    with tempfile.TemporaryDirectory(prefix="rehear-bench-example-") as tmp:
        try:
            workload = configured(args.config, args.messages) if args.config else example(Path(tmp))
            if args.messages and not args.config:
                workload = configured(workload.config, args.messages)
            result = run_bench(workload, options, log=sys.stderr)
        except (RehearError, ValueError, OSError) as exc:
            print(f"rehear bench: {exc}", file=sys.stderr)
            return 2
    print(format_table(result))
    if args.markdown:
        print("\n" + format_markdown(result))
    if args.json is not None:
        args.json.write_text(json.dumps(result, indent=1) + "\n")
    return 0

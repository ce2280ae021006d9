"""`rehear demo`: the whole relay on one machine, with nothing but Python (relay.workbench.demo)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from relay.cli.common import delegate
from relay.core.errors import ConfigError, WorkFailed
from relay.live.active import load_active
from relay.live.serve import run_coroutine
from relay.workbench.demo import DemoOptions, play

__all__ = ["add_parser", "run"]

_EXAMPLES = Path(__file__).resolve().parents[2] / "examples" / "demo"
_WORKSHOP = _EXAMPLES.parent / "workshop"


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "demo",
        help="run broker, relay, recogniser and NLU stand-ins on this machine and show what happens",
        description=(
            "Start an embedded MQTT broker (or use --broker), the relay with the example configuration,\n"
            "replay recorded recogniser messages and print, per utterance, what was said and heard, what\n"
            "was sent on, the decision with the rule and the confidence behind it, and whether the\n"
            "entities sent on are the ones said. Ends with a summary. The default corpus is the workshop\n"
            "scenario as Whisper (tiny.en) heard it; --corpus examples/workshop/corpus.jsonl replays\n"
            "pocketsphinx's far noisier output."
        ),
    )
    parser.add_argument("--broker", metavar="HOST:PORT", help="use this broker instead of the embedded one")
    parser.add_argument("--config", type=Path, default=_WORKSHOP / "relay.yaml", help="relay configuration")
    parser.add_argument("--corpus", type=Path, default=_WORKSHOP / "corpus-whisper.jsonl",
                        help="labelled corpus whose recorded recogniser messages are replayed")
    parser.add_argument("--count", type=int, default=20,
                        help="corpus utterances to replay, spread over the file (default 20; 0 for none)")
    parser.add_argument("--messages", type=Path, default=_EXAMPLES / "messages.jsonl",
                        help="further recogniser messages replayed after them, one per line (default: "
                        "hand-written edge cases: a partial result, malformed input)")
    parser.add_argument("--interval", type=float, default=0.1, help="seconds between messages (default 0.1)")
    parser.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for each result")
    parser.add_argument("--linger", type=float, default=0.0,
                        help="keep the relay and its /metrics up this many seconds after the summary")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    if not args.messages.exists() and not args.corpus.exists():
        raise ConfigError(f"nothing to replay: neither {args.messages} nor {args.corpus} exists")
    active = load_active(args.config)
    options = DemoOptions(corpus=args.corpus, messages=args.messages, count=args.count, interval=args.interval,
                          timeout=args.timeout, linger=args.linger, broker=args.broker)
    result: int = run_coroutine(play(options, active, sys.stdout))
    if result != 0:
        raise WorkFailed("some messages got no result within --timeout (listed above)")
    return result


def main(argv: list[str] | None = None) -> int:
    return delegate("demo", argv)


if __name__ == "__main__":
    sys.exit(main())

"""`rehear run CONFIG`: the relay as a long-running service."""

from __future__ import annotations

import argparse
import logging
import sys
from typing import Any

from relay import __version__
from relay.core.errors import RehearError
from relay.live.active import load_active
from relay.live.logs import setup_logging
from relay.live.serve import EVENT_LOOPS, run_coroutine, serve

__all__ = ["add_parser", "main", "run"]

_log = logging.getLogger("rehear.run")


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "run",
        help="relay recogniser messages from MQTT through the stage chain",
        description=(
            "Subscribe to the recogniser's topics, clean every N-best list with the configured "
            "stage chain and publish the result. Serves /metrics and /healthz. "
            "SIGHUP reloads the configuration without dropping a message; SIGTERM or Ctrl-C "
            "finishes the messages in flight, then stops."
        ),
    )
    parser.add_argument("config", help="relay configuration (YAML)")
    parser.add_argument("--log-format", choices=["plain", "json"], help="overrides logging.format")
    parser.add_argument("--log-level", choices=["debug", "info", "warning", "error"],
                        help="overrides logging.level")
    parser.add_argument("--metrics-port", type=int, help="overrides metrics.port (0 picks a free port)")
    parser.add_argument("--event-loop", choices=EVENT_LOOPS, default="auto",
                        help="auto (default): uvloop when installed (pip install 'rehear[fast]'), else "
                        "asyncio's own; asyncio: never uvloop; uvloop: require it")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    try:
        active = load_active(args.config, progress=sys.stderr.isatty())
    except RehearError as exc:
        print(exc, file=sys.stderr)
        return 2
    logging_settings = active.loaded.config.logging
    setup_logging(args.log_format or logging_settings.format, args.log_level or logging_settings.level)
    _log.info("starting", extra={"fields": {"version": __version__, "config": args.config,
                                            "config_hash": active.loaded.hash,
                                            "stages": ",".join(active.chain.names)}})
    try:
        run_coroutine(serve(active, config_path=args.config, metrics_port=args.metrics_port, freeze_heap=True),
                      event_loop=args.event_loop)
    except RehearError as exc:
        print(exc, file=sys.stderr)
        return 2
    _log.info("stopped")
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="rehear")
    add_parser(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(["run", *(sys.argv[1:] if argv is None else argv)])
    return run(args)


if __name__ == "__main__":
    sys.exit(main())

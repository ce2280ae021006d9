"""`rehear run CONFIG`: the relay as a long-running service."""

from __future__ import annotations

import argparse
import logging
import sys
from typing import Any

from relay import __version__
from relay.cli.common import delegate
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
            "Subscribe to the recogniser's topics, clean every N-best list with the configured\n"
            "stage chain and publish the result. Serves /metrics and /healthz.\n"
            "SIGHUP reloads the configuration without dropping a message; SIGTERM or Ctrl-C\n"
            "finishes the messages in flight, then stops. With a capture: section the relay also\n"
            "records what it receives and sends (for `rehear label`)."
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
    active = load_active(args.config, progress=sys.stderr.isatty())
    logging_settings = active.loaded.config.logging
    setup_logging(args.log_format or logging_settings.format, args.log_level or logging_settings.level)
    _log.info("starting", extra={"fields": {"version": __version__, "config": args.config,
                                            "config_hash": active.loaded.hash,
                                            "stages": ",".join(active.chain.names)}})
    run_coroutine(serve(active, config_path=args.config, metrics_port=args.metrics_port, freeze_heap=True),
                  event_loop=args.event_loop)
    _log.info("stopped")
    return 0


def main(argv: list[str] | None = None) -> int:
    return delegate("run", argv)


if __name__ == "__main__":
    sys.exit(main())

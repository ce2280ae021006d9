"""`rehear run CONFIG`: the relay as a long-running service."""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import signal
import sys
from collections.abc import Awaitable, Callable, Coroutine
from typing import Any

from prometheus_client import CollectorRegistry

from relay import __version__
from relay.errors import RehearError
from relay.health import HealthServer
from relay.logs import setup_logging
from relay.metrics import Metrics
from relay.service import Active, Relay, load_active

__all__ = ["add_parser", "event_loop_runner", "run", "serve"]

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


async def serve(
    active: Active,
    *,
    config_path: str | None = None,
    metrics_port: int | None = None,
    registry: CollectorRegistry | None = None,
    on_ready: Callable[[Relay, HealthServer | None], Awaitable[None] | None] | None = None,
    signals: bool = True,
    freeze_heap: bool = False,
) -> Relay:
    """Run the relay and its HTTP endpoint until a stop is requested and the drain is over.

    ``freeze_heap`` keeps the loaded chain out of the garbage collector's walks (relay.heap):
    right for a process that runs nothing else, as `rehear run` is."""
    registry = registry or CollectorRegistry()
    relay = Relay(active, Metrics(registry), config_path=config_path, version=__version__, freeze_heap=freeze_heap)
    settings = active.loaded.config.metrics
    health = None
    if settings.enabled:
        port = settings.port if metrics_port is None else metrics_port
        health = HealthServer(registry, relay.health, host=settings.host, port=port)
        await health.start()
        _log.info("metrics at " + health.address + "/metrics")
    loop = asyncio.get_running_loop()
    installed: list[signal.Signals] = []
    reloads: set[asyncio.Task[bool]] = set()

    def _reload() -> None:
        task = loop.create_task(relay.reload())
        reloads.add(task)
        task.add_done_callback(reloads.discard)

    if signals:
        for number, action in ((signal.SIGTERM, relay.request_stop), (signal.SIGINT, relay.request_stop),
                               (signal.SIGHUP, _reload)):
            with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
                loop.add_signal_handler(number, action)
                installed.append(number)
    try:
        if on_ready is not None:
            result = on_ready(relay, health)
            if result is not None:
                await result
        await relay.run()
    finally:
        for number in installed:
            loop.remove_signal_handler(number)
        if health is not None:
            await health.stop()
    return relay


EVENT_LOOPS = ("auto", "asyncio", "uvloop")


def event_loop_runner(kind: str = "auto") -> asyncio.Runner:
    """uvloop when installed and not refused (fewer CPU microseconds per message; see
    docs/operations.md for the numbers), else asyncio's own loop."""
    if kind == "asyncio":
        return asyncio.Runner()
    try:
        import uvloop
    except ImportError:
        if kind == "uvloop":
            raise RehearError("--event-loop uvloop: uvloop is not installed (pip install 'rehear[fast]')") from None
        return asyncio.Runner()
    return asyncio.Runner(loop_factory=uvloop.new_event_loop)


def run_coroutine(coroutine: Coroutine[Any, Any, Any], *, event_loop: str = "auto") -> Any:
    try:
        runner = event_loop_runner(event_loop)
    except RehearError:
        coroutine.close()  # never awaited: close it so Python does not warn
        raise
    with runner:
        return runner.run(coroutine)


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

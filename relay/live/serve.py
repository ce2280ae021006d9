"""The relay as a running service: metrics endpoint, signals, the event loop it runs on."""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
from collections.abc import Awaitable, Callable, Coroutine
from typing import Any

from prometheus_client import CollectorRegistry

from relay import __version__
from relay.core.errors import RehearError, WorkFailed
from relay.live.active import Active
from relay.live.capture import CaptureWriter
from relay.live.health import HealthServer
from relay.live.looplag import watch_loop_lag
from relay.live.metrics import Metrics
from relay.live.service import Relay

__all__ = ["EVENT_LOOPS", "event_loop_runner", "run_coroutine", "serve"]

_log = logging.getLogger("rehear.run")


async def serve(
    active: Active,
    *,
    config_path: str | None = None,
    metrics_port: int | None = None,
    registry: CollectorRegistry | None = None,
    on_ready: Callable[[Relay, HealthServer | None], Awaitable[None] | None] | None = None,
    signals: bool = True,
    freeze_heap: bool = False,
    reloader: Callable[[], Active] | None = None,
) -> Relay:
    """Run the relay and its HTTP endpoint until a stop is requested and the drain is over.

    ``freeze_heap`` keeps the loaded chain out of the garbage collector's walks (relay.heap):
    right for a process that runs nothing else, as `rehear run` is."""
    registry = registry or CollectorRegistry()
    metrics = Metrics(registry)
    capture = None
    if active.loaded.config.capture.enabled:
        capture = CaptureWriter(active.loaded.config.capture, active.loaded.base_dir,
                                on_drop=metrics.capture_dropped.inc, on_write=metrics.capture_records.inc)
        try:
            capture.start()
        except OSError as exc:
            raise WorkFailed(f"cannot capture into {capture.directory}: {exc.strerror or exc}") from None
    relay = Relay(active, metrics, config_path=config_path, reloader=reloader, version=__version__,
                  freeze_heap=freeze_heap, capture=capture)
    settings = active.loaded.config.metrics
    health = None
    if settings.enabled:
        port = settings.port if metrics_port is None else metrics_port
        health = HealthServer(registry, relay.health, host=settings.host, port=port)
        try:
            await health.start()
        except OSError as exc:
            if capture is not None:
                capture.close()
            raise WorkFailed(f"cannot serve metrics on {settings.host}:{port}: {exc.strerror or exc} "
                              "(set metrics.port, or --metrics-port 0 for any free port)") from None
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
    lag = asyncio.create_task(watch_loop_lag(relay.metrics.loop_lag))
    try:
        if on_ready is not None:
            result = on_ready(relay, health)
            if result is not None:
                await result
        await relay.run()
    finally:
        lag.cancel()
        for number in installed:
            loop.remove_signal_handler(number)
        if health is not None:
            await health.stop()
        if capture is not None:
            await asyncio.to_thread(capture.close)
    return relay


EVENT_LOOPS = ("auto", "asyncio", "uvloop")


def event_loop_runner(kind: str = "auto") -> asyncio.Runner:
    """uvloop when installed and not refused (fewer CPU microseconds per message; see
    relay/live/README.md for the numbers), else asyncio's own loop."""
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

"""Helpers for broker tests: configurations on unique topics, a relay in the test's event loop,
a downstream collector, and waits that end on the event a test needs, each with a timeout."""

from __future__ import annotations

import asyncio
import contextlib
import queue
import threading
import time
import urllib.error
import urllib.request
import uuid
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import aiomqtt
import orjson
import yaml
from prometheus_client import CollectorRegistry

from relay.core.config import build_chain, load_config
from relay.core.registry import Registry
from relay.live.active import Active
from relay.live.health import HealthServer
from relay.live.metrics import OUTCOMES
from relay.live.serve import serve
from relay.live.service import Relay

__all__ = ["Collector", "LogLines", "Received", "RunningRelay", "edit_config", "eventually", "healthz", "ids", "load",
           "make_config", "message", "publish_all", "running_relay"]


async def eventually(condition: Callable[[], bool], *, timeout: float = 5, what: str = "the condition") -> None:
    """Return as soon as ``condition()`` holds; TimeoutError naming ``what`` after ``timeout`` s.

    For state the code under test exposes but does not announce (a counter bumped after an
    acknowledgement, the connection flag): it is checked every 10 ms, so the wait lasts as
    long as the event takes, never a guessed time.
    """
    end = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > end:
            raise TimeoutError(f"{what}: not within {timeout} s")
        await asyncio.sleep(0.01)


def make_config(tmp_path: Path, broker: Any, /, *, protocol: str = "5", stages: list[Any] | None = None,
                name: str | None = None, prefix: str | None = None, **sections: dict[str, Any]) -> tuple[Path, str]:
    """A relay configuration on topics no other test uses; returns (path, topic prefix)."""
    prefix = prefix or f"t{uuid.uuid4().hex[:10]}"
    config: dict[str, Any] = {
        "broker": {"host": broker.host, "port": broker.port, "protocol": protocol,
                   "client_id": f"rehear-{prefix}", "reconnect_min_s": 0.1, "reconnect_max_s": 0.5},
        "topics": {"inputs": [f"{prefix}/asr/+/nbest"], "output": f"{prefix}/nlu/{{source}}/in",
                   "prompt": f"{prefix}/say/{{source}}", "dead_letter": f"{prefix}/dead"},
        "metrics": {"port": 0},
        "stages": stages or ["normalize"],
    }
    for key, value in sections.items():
        config.setdefault(key, {}).update(value)
    path = tmp_path / (name or f"relay-{prefix}.yaml")
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path, prefix


def edit_config(path: Path, change: Callable[[dict[str, Any]], None]) -> Path:
    """Change a configuration file written by make_config in place."""
    config = yaml.safe_load(path.read_text())
    change(config)
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def healthz(address: str) -> tuple[int, str]:
    """GET /healthz: (status, body). Blocking: call it through asyncio.to_thread."""
    try:
        with urllib.request.urlopen(address + "/healthz", timeout=5) as response:
            return int(response.status), response.read().decode()
    except urllib.error.HTTPError as exc:
        return int(exc.code), exc.read().decode()


def ids(items: list[Received]) -> list[str]:
    """The ``id`` of every received JSON message, duplicates kept."""
    return [orjson.loads(item.payload)["id"] for item in items]


def message(ident: str, *texts: str, **extra: Any) -> dict[str, Any]:
    return {"id": ident, "source": "kiosk-1", "nbest": [{"text": text, "conf": 0.5} for text in texts], **extra}


def load(path: Path, registry: Registry | None = None) -> Active:
    loaded = load_config(path)
    chain = build_chain(loaded, registry=registry)
    chain.load()
    return Active(loaded, chain)


@dataclass
class RunningRelay:
    relay: Relay
    health: HealthServer | None
    registry: CollectorRegistry
    task: asyncio.Task[Relay]

    async def stop(self) -> None:
        self.relay.request_stop()
        await asyncio.wait_for(self.task, timeout=20)

    async def wait_connected(self, timeout: float = 10) -> None:
        await eventually(lambda: self.relay.connected, timeout=timeout, what="relay connected")

    def metric(self, name: str, **labels: str) -> float:
        """A sample read back from this relay's own registry (0 when it has none yet)."""
        value = self.registry.get_sample_value(name, labels)
        return 0.0 if value is None else value

    def handled(self) -> float:
        """Input messages done with, whatever the outcome."""
        return sum(self.metric("rehear_messages_total", outcome=outcome) for outcome in OUTCOMES)

    async def wait_handled(self, count: int, timeout: float = 5) -> None:
        """Wait until the relay has counted ``count`` messages and holds none in flight.

        A result reaches a subscriber before the relay counts its input: the outcome counter
        is bumped after the acknowledgement, which follows the publish. A test that reads the
        metrics as soon as the results are in waits here first.
        """
        try:
            await eventually(lambda: self.handled() >= count and self.metric("rehear_in_flight_messages") == 0,
                             timeout=timeout)
        except TimeoutError:
            raise TimeoutError(f"relay counted {self.handled():g} of {count} messages within {timeout} s, "
                               f"{self.metric('rehear_in_flight_messages'):g} in flight") from None


@contextlib.asynccontextmanager
async def running_relay(active: Active, *, config_path: Path | None = None, connect: bool = True,
                        reloader: Callable[[], Active] | None = None) -> AsyncIterator[RunningRelay]:
    """The relay on this event loop; ``connect=False`` does not wait for the broker connection
    (for tests where it must fail)."""
    ready: asyncio.Future[tuple[Relay, HealthServer | None]] = asyncio.get_running_loop().create_future()
    registry = CollectorRegistry()
    options: dict[str, Any] = {"reloader": reloader} if reloader is not None else {}
    task = asyncio.create_task(serve(active, config_path=str(config_path) if config_path else None,
                                     registry=registry, signals=False, **options,
                                     on_ready=lambda relay, health: ready.set_result((relay, health))))
    # serve() calls on_ready once its endpoint is up; if it fails before that, its error is the news.
    either: set[asyncio.Future[Any]] = {ready, task}
    await asyncio.wait(either, timeout=10, return_when=asyncio.FIRST_COMPLETED)
    if not ready.done():
        if task.done():
            task.result()  # raises what serve() raised
        task.cancel()
        await asyncio.gather(task, return_exceptions=True)
        raise TimeoutError("relay not ready within 10 s")
    relay, health = ready.result()
    handle = RunningRelay(relay, health, registry, task)
    if connect:
        await handle.wait_connected()
    try:
        yield handle
    finally:
        if not task.done():
            await handle.stop()


@dataclass
class Received:
    topic: str
    payload: bytes
    properties: dict[str, str] = field(default_factory=dict)


class Collector:
    """A downstream client (MQTT 5, persistent session) gathering everything on ``filters``."""

    def __init__(self, broker: Any, filters: list[str], *, identifier: str | None = None,
                 **client_options: Any) -> None:
        """``client_options`` go to aiomqtt.Client (username, password, tls_context)."""
        self.broker = broker
        self.filters = filters
        self.client_options = client_options
        self.identifier = identifier or f"collector-{uuid.uuid4().hex[:10]}"
        self.received: list[Received] = []
        self._arrived = asyncio.Condition()
        self._task: asyncio.Task[None] | None = None

    async def run(self) -> None:
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        properties = Properties(PacketTypes.CONNECT)
        properties.SessionExpiryInterval = 600
        while True:  # reconnects across broker restarts; cancelled by the test
            try:
                async with aiomqtt.Client(self.broker.host, self.broker.port, identifier=self.identifier,
                                          protocol=aiomqtt.ProtocolVersion.V5, clean_start=False,
                                          properties=properties, **self.client_options) as client:
                    await client.subscribe([(topic, 1) for topic in self.filters])
                    self.connected.set()
                    async for item in client.messages:
                        props = {}
                        if item.properties is not None and hasattr(item.properties, "UserProperty"):
                            props = dict(item.properties.UserProperty)
                        self.received.append(Received(item.topic.value, bytes(item.payload), props))
                        async with self._arrived:
                            self._arrived.notify_all()
            except aiomqtt.MqttError:
                self.connected.clear()
                # The broker is down (a test is restarting it): try again every 0.1 s; the
                # test's own wait for what it expects bounds how long.
                await asyncio.sleep(0.1)

    async def __aenter__(self) -> Collector:
        self.connected = asyncio.Event()
        self._task = asyncio.create_task(self.run())
        await asyncio.wait_for(self.connected.wait(), timeout=10)
        return self

    async def __aexit__(self, *exc_info: object) -> None:
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)

    async def wait_for(self, predicate: Callable[[list[Received]], bool], timeout: float = 10) -> None:
        """Return once ``predicate(self.received)`` holds, checked on every arrival."""
        try:
            async with asyncio.timeout(timeout), self._arrived:
                await self._arrived.wait_for(lambda: predicate(self.received))
        except TimeoutError:
            raise TimeoutError(f"condition not met within {timeout} s; "
                               f"{len(self.received)} messages received") from None

    def on(self, topic_prefix: str) -> list[Received]:
        return [item for item in self.received if item.topic.startswith(topic_prefix)]


async def publish_all(broker: Any, topic: str, payloads: list[bytes], *, qos: int = 1, gap_s: float = 0.0,
                      **client_options: Any) -> None:
    """Publish in order; at QoS 1 each publish returns once the broker has acknowledged it.

    ``gap_s`` paces the stream, so that an event a test causes (a kill, a reload) lands while
    the relay is still working through it: the pause is the stream's shape, not a wait.
    ``client_options`` go to aiomqtt.Client (username, password, tls_context).
    """
    async with aiomqtt.Client(broker.host, broker.port, identifier=f"pub-{uuid.uuid4().hex[:10]}",
                              **client_options) as client:
        for payload in payloads:
            await client.publish(topic, payload, qos=qos)
            if gap_s:
                await asyncio.sleep(gap_s)


class LogLines:
    """A process's stderr, read line by line on a thread of its own.

    A plain ``readline()`` blocks for as long as the process stays silent, so a wait built on
    it has no timeout; and a pipe nobody reads fills up and stalls the process that logs.
    """

    def __init__(self, stream: IO[str]) -> None:
        self.seen: list[str] = []
        self._lines: queue.SimpleQueue[str | None] = queue.SimpleQueue()
        self._ended = False
        self._thread = threading.Thread(target=self._read, args=(stream,), name="stderr-lines", daemon=True)
        self._thread.start()

    def _read(self, stream: IO[str]) -> None:
        try:
            for line in stream:
                self._lines.put(line)
        except (OSError, ValueError):
            pass  # the stream was closed under the thread: the end, as for end of file
        finally:
            self._lines.put(None)

    def _next(self, timeout: float) -> str | None:
        """The next line; None at the end of the stream; queue.Empty after ``timeout`` s."""
        if self._ended:
            return None
        line = self._lines.get(timeout=max(timeout, 0.0))
        if line is None:
            self._ended = True
        else:
            self.seen.append(line)
        return line

    def wait_for(self, needle: str, timeout: float = 15) -> None:
        """Return at the first line from now on that holds ``needle``; AssertionError after ``timeout`` s."""
        end = time.monotonic() + timeout
        while True:
            try:
                line = self._next(end - time.monotonic())
            except queue.Empty:
                raise AssertionError(f"{needle!r} not logged within {timeout} s; got:\n{''.join(self.seen)}") from None
            if line is None:
                raise AssertionError(f"{needle!r} not logged before stderr closed; got:\n{''.join(self.seen)}")
            if needle in line:
                return

    def rest(self, timeout: float = 10) -> list[str]:
        """Every line up to the end of the stream (after the process has exited); all lines seen."""
        end = time.monotonic() + timeout
        try:
            while self._next(end - time.monotonic()) is not None:
                pass
        except queue.Empty:
            raise AssertionError(f"stderr still open after {timeout} s") from None
        return self.seen

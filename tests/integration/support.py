"""Helpers for broker tests: configurations on unique topics, a relay in the test's event loop,
and a downstream collector."""

from __future__ import annotations

import asyncio
import contextlib
import time
import uuid
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiomqtt
import yaml
from prometheus_client import CollectorRegistry

from relay.core.config import build_chain, load_config
from relay.core.registry import Registry
from relay.live.health import HealthServer
from relay.live.serve import serve
from relay.live.service import Active, Relay

__all__ = ["Collector", "Received", "RunningRelay", "make_config", "message", "publish_all"]


def make_config(tmp_path: Path, broker: Any, *, protocol: str = "5", stages: list[Any] | None = None,
                name: str | None = None, **sections: dict[str, Any]) -> tuple[Path, str]:
    """A relay configuration on topics no other test uses; returns (path, topic prefix)."""
    prefix = f"t{uuid.uuid4().hex[:10]}"
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
        end = time.monotonic() + timeout
        while not self.relay.connected:
            if time.monotonic() > end:
                raise TimeoutError("relay did not connect")
            await asyncio.sleep(0.02)


@contextlib.asynccontextmanager
async def running_relay(active: Active, *, config_path: Path | None = None) -> AsyncIterator[RunningRelay]:
    ready: asyncio.Future[tuple[Relay, HealthServer | None]] = asyncio.get_running_loop().create_future()
    registry = CollectorRegistry()
    task = asyncio.create_task(serve(active, config_path=str(config_path) if config_path else None,
                                     registry=registry, signals=False,
                                     on_ready=lambda relay, health: ready.set_result((relay, health))))
    relay, health = await asyncio.wait_for(ready, timeout=10)
    handle = RunningRelay(relay, health, registry, task)
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

    def __init__(self, broker: Any, filters: list[str], *, identifier: str | None = None) -> None:
        self.broker = broker
        self.filters = filters
        self.identifier = identifier or f"collector-{uuid.uuid4().hex[:10]}"
        self.received: list[Received] = []
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
                                          properties=properties) as client:
                    await client.subscribe([(topic, 1) for topic in self.filters])
                    self.connected.set()
                    async for item in client.messages:
                        props = {}
                        if item.properties is not None and hasattr(item.properties, "UserProperty"):
                            props = dict(item.properties.UserProperty)
                        self.received.append(Received(item.topic.value, bytes(item.payload), props))
            except aiomqtt.MqttError:
                self.connected.clear()
                await asyncio.sleep(0.2)

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
        end = time.monotonic() + timeout
        while not predicate(self.received):
            if time.monotonic() > end:
                raise TimeoutError(f"condition not met; {len(self.received)} messages received")
            await asyncio.sleep(0.02)

    def on(self, topic_prefix: str) -> list[Received]:
        return [item for item in self.received if item.topic.startswith(topic_prefix)]


async def publish_all(broker: Any, topic: str, payloads: list[bytes], *, qos: int = 1, gap_s: float = 0.0) -> None:
    """Publish in order; ``gap_s`` paces the stream so events can land in the middle of it."""
    async with aiomqtt.Client(broker.host, broker.port, identifier=f"pub-{uuid.uuid4().hex[:10]}") as client:
        for payload in payloads:
            await client.publish(topic, payload, qos=qos)
            if gap_s:
                await asyncio.sleep(gap_s)

"""Delivery guarantees through a real mosquitto: persistent sessions, broker restarts,
shared subscriptions and hot reload, each with 0 messages lost."""

from __future__ import annotations

import asyncio
import time
import uuid
from pathlib import Path
from typing import Any

import aiomqtt
import orjson
import pytest
import yaml

from tests.integration.support import (
    Collector,
    eventually,
    load,
    make_config,
    message,
    publish_all,
    running_relay,
)

pytestmark = pytest.mark.broker


def _ids(items: list[Any]) -> set[str]:
    return {orjson.loads(item.payload)["id"] for item in items}


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_messages_published_while_the_relay_is_down_arrive_when_it_returns(
    broker: Any, tmp_path: Path, protocol: str
) -> None:
    path, prefix = make_config(tmp_path, broker, protocol=protocol)
    wanted = {f"down-{n}" for n in range(50)}

    async def scenario() -> None:
        async with Collector(broker, [f"{prefix}/nlu/#"]) as down:
            async with running_relay(load(path)) as first:
                pass  # first connection creates the persistent session, then a clean stop
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest",
                              [orjson.dumps(message(ident, "while away")) for ident in sorted(wanted)])
            async with running_relay(load(path)) as second:
                await down.wait_for(lambda items: _ids(items) >= wanted)
                await second.wait_handled(len(wanted))
        assert _ids(down.received) == wanted
        # Every result came from the second relay, out of the session the broker kept: the
        # first had stopped before anything was published.
        assert first.task.done() and first.handled() == 0
        assert second.metric("rehear_messages_total", outcome="cleaned") == len(wanted)

    asyncio.run(scenario())


async def _publish_reliably(broker: Any, topic: str, payloads: list[bytes], *, restart_after: int,
                            timeout: float = 30) -> None:
    """QoS 1 publisher that retries what the broker did not acknowledge; restarts the broker once."""
    identifier = f"pub-{uuid.uuid4().hex[:10]}"
    index = 0
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            async with aiomqtt.Client(broker.host, broker.port, identifier=identifier, timeout=3) as client:
                while index < len(payloads):
                    if index == restart_after:
                        restart_after = -1
                        # returns once the new broker accepts connections
                        await asyncio.to_thread(broker.restart)
                    await client.publish(topic, payloads[index], qos=1)
                    index += 1
                    # A paced stream, so the relay is still at work on it when the broker goes.
                    await asyncio.sleep(0.002)
                return
        except aiomqtt.MqttError:
            # The restart broke this connection; the broker is listening again by now, so
            # reconnect after a short pause (the pause only keeps a refused connect from spinning).
            await asyncio.sleep(0.05)
    raise TimeoutError(f"published {index} of {len(payloads)} within {timeout} s")


def test_broker_restart_mid_stream_loses_nothing(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker)
    wanted = [f"r-{n:03d}" for n in range(200)]
    payloads = [orjson.dumps(message(ident, "book the bandsaw")) for ident in wanted]

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await _publish_reliably(broker, f"{prefix}/asr/kiosk-1/nbest", payloads, restart_after=100)
            await down.wait_for(lambda items: _ids(items) >= set(wanted), timeout=30)
            assert relay.metric("rehear_reconnects_total") >= 1  # the restart was really seen
        assert _ids(down.received) == set(wanted)  # 0 lost (duplicates are allowed: at-least-once)

    asyncio.run(scenario())


def test_shared_subscription_splits_the_work_between_instances(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, name="a.yaml")
    config = yaml.safe_load(path.read_text())
    config["topics"]["inputs"] = [f"$share/relays/{prefix}/asr/+/nbest"]
    path.write_text(yaml.safe_dump(config))
    config["broker"]["client_id"] += "-b"
    second = tmp_path / "b.yaml"
    second.write_text(yaml.safe_dump(config))
    wanted = [f"s-{n}" for n in range(40)]

    async def scenario() -> None:
        async with running_relay(load(path)) as one, running_relay(load(second)) as two, \
                Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest",
                              [orjson.dumps(message(ident, "words")) for ident in wanted])
            await down.wait_for(lambda items: len(items) >= len(wanted))
            # Each relay counts an input after acknowledging it, a moment after its result is out.
            await eventually(lambda: one.handled() + two.handled() >= len(wanted), what="both relays counted")
            handled = [r.metric("rehear_messages_total", outcome="cleaned") for r in (one, two)]
        assert sorted(orjson.loads(item.payload)["id"] for item in down.received) == sorted(wanted)
        assert sum(handled) == len(wanted)
        assert min(handled) > 0  # the broker shared the input between both instances

    asyncio.run(scenario())


def test_reload_swaps_the_chain_without_dropping_a_message(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker)
    wanted = [f"h-{n:03d}" for n in range(150)]
    during, after = wanted[:120], wanted[120:]  # published while reloading; after the swap

    async def scenario() -> None:
        async with running_relay(load(path), config_path=path) as relay, \
                Collector(broker, [f"{prefix}/nlu/#"]) as down:
            old_hash = relay.relay.active.loaded.hash
            config = yaml.safe_load(path.read_text())
            config["stages"] = [{"normalize": {"rank_decay": 1.5}}]
            path.write_text(yaml.safe_dump(config))
            topic = f"{prefix}/asr/kiosk-1/nbest"
            publishing = asyncio.create_task(publish_all(
                broker, topic, [orjson.dumps(message(ident, "a", "b")) for ident in during], gap_s=0.002))
            # Reload once the old chain is relaying the stream, while the rest is still coming.
            await down.wait_for(lambda items: len(items) >= 20)
            before = _ids(down.received)
            assert await asyncio.wait_for(relay.relay.reload(), timeout=10)
            new_hash = relay.relay.active.loaded.hash
            await publishing
            await publish_all(broker, topic, [orjson.dumps(message(ident, "a", "b")) for ident in after])
            await down.wait_for(lambda items: _ids(items) >= set(wanted))
            # a broken configuration is refused and the running chain stays
            path.write_text("stages: [no_such_stage]\n")
            assert not await asyncio.wait_for(relay.relay.reload(), timeout=10)
            assert relay.relay.active.loaded.hash == new_hash
        hashes = {orjson.loads(item.payload)["id"]: orjson.loads(item.payload)["relay"]["config_hash"]
                  for item in down.received}
        assert new_hash != old_hash
        assert {hashes[ident] for ident in before} == {old_hash}
        assert {hashes[ident] for ident in after} == {new_hash}
        assert _ids(down.received) == set(wanted)

    asyncio.run(scenario())

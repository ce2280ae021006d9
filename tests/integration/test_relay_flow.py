"""End to end through a real mosquitto: cleaned output, dead letters, stage failures, metrics."""

from __future__ import annotations

import asyncio
import base64
import random
import threading
import time
import urllib.request
from typing import Any, ClassVar

import orjson
import pytest
from prometheus_client.parser import text_string_to_metric_families
from pydantic import BaseModel, ConfigDict

from relay.core.utterance import Utterance
from tests.integration.support import (
    Collector,
    eventually,
    load,
    make_config,
    message,
    publish_all,
    running_relay,
)
from tests.plain_stage import PlainStage, registry_of

pytestmark = pytest.mark.broker


def _scrape(address: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    # prometheus_client.parser.text_string_to_metric_families is the reference reader of the
    # Prometheus text exposition format (prometheus/client_python); the test reads /metrics
    # with it rather than with its own parser.
    with urllib.request.urlopen(address + "/metrics", timeout=5) as response:
        text = response.read().decode()
    samples = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            samples[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return samples


def test_message_comes_out_cleaned_with_a_trace(broker: Any, tmp_path: Any) -> None:
    path, prefix = make_config(tmp_path, broker)

    async def scenario() -> None:
        async with running_relay(load(path)), Collector(broker, [f"{prefix}/#"]) as downstream:
            payload = message("u-1", "Book the  carving band saw", "book the carving band saw", extra_field=7)
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(payload)])
            await downstream.wait_for(lambda items: len(items) >= 2)  # the input itself and the result
        out = downstream.on(f"{prefix}/nlu/")
        assert [item.topic for item in out] == [f"{prefix}/nlu/kiosk-1/in"]
        cleaned = orjson.loads(out[0].payload)
        assert cleaned["text"] == "book the carving band saw"
        assert cleaned["extra_field"] == 7
        assert [entry["stage"] for entry in cleaned["trace"]] == ["normalize"]
        assert cleaned["trace"][0]["elapsed_us"] > 0
        assert abs(sum(item["posterior"] for item in cleaned["nbest"]) - 1.0) < 1e-9
        assert cleaned["relay"]["published_at"] >= cleaned["relay"]["received_at"]

    asyncio.run(scenario())


BAD_INPUTS = [
    ("invalid_json", b'{"id": "x", "nbest": ['),
    ("not_utf8", b'{"id": "\xff\xfe", "nbest": [{"text": "a"}]}'),
    ("schema", orjson.dumps({"id": "x", "nbest": []})),
    ("schema", orjson.dumps({"id": "x", "nbest": [{"text": "a", "conf": 3}]})),
    ("schema", b"[1, 2, 3]"),
    ("too_many_hypotheses", orjson.dumps(message("x", *[f"hypothesis {i}" for i in range(60)]))),
    ("oversize", orjson.dumps(message("x", "a" * 5000))),
]


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_bad_input_goes_to_dead_letters_and_good_input_keeps_flowing(
    broker: Any, tmp_path: Any, protocol: str
) -> None:
    path, prefix = make_config(tmp_path, broker, protocol=protocol, limits={"max_payload_bytes": 4096})
    payloads = []
    for number, (_reason, bad) in enumerate(BAD_INPUTS):
        payloads += [bad, orjson.dumps(message(f"good-{number}", "fine words"))]

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/nlu/#", f"{prefix}/dead"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", payloads)
            await down.wait_for(lambda items: len(items) >= len(payloads))
            await relay.wait_handled(len(payloads))
            samples = await asyncio.to_thread(_scrape, relay.health.address)
        dead = down.on(f"{prefix}/dead")
        good = down.on(f"{prefix}/nlu/")
        assert [orjson.loads(item.payload)["id"] for item in good] == [f"good-{n}" for n in range(len(BAD_INPUTS))]
        assert len(dead) == len(BAD_INPUTS)
        for item, (reason, original) in zip(dead, BAD_INPUTS):
            if protocol == "5":
                # MQTT 5: the payload is the input unchanged, the reason travels in user properties
                assert item.payload == original
                assert item.properties["reason"] == reason
                assert item.properties["topic"] == f"{prefix}/asr/kiosk-1/nbest"
                assert item.properties["detail"].startswith(f"topic {prefix}/asr/kiosk-1/nbest")
            else:
                envelope = orjson.loads(item.payload)
                assert envelope["reason"] == reason
                assert envelope["topic"] == f"{prefix}/asr/kiosk-1/nbest"
                assert base64.b64decode(envelope["payload_b64"]) == original
        for reason in {r for r, _ in BAD_INPUTS}:
            expected = sum(1 for r, _ in BAD_INPUTS if r == reason)
            assert samples[("rehear_dead_letters_total", (("reason", reason),))] == expected
        assert samples[("rehear_messages_total", (("outcome", "dead_letter"),))] == len(BAD_INPUTS)
        assert samples[("rehear_messages_total", (("outcome", "cleaned"),))] == len(BAD_INPUTS)
        assert samples[("rehear_stage_latency_seconds_count", (("stage", "normalize"),))] == len(BAD_INPUTS)
        assert samples[("rehear_broker_connected", ())] == 1
        assert samples[("rehear_in_flight_messages", ())] == 0

    asyncio.run(scenario())


def _malformed(rng: random.Random) -> bytes:
    kind = rng.randrange(7)
    good = orjson.dumps(message("fuzz", "some words here", "some word here"))
    if kind == 0:
        return bytes(rng.randrange(256) for _ in range(rng.randrange(0, 300)))
    if kind == 1:
        return good[: rng.randrange(0, len(good) - 1)]
    if kind == 2:
        cut = bytearray(good)
        for _ in range(rng.randrange(1, 6)):
            cut[rng.randrange(len(cut))] = rng.randrange(256)
        return bytes(cut) if orjson_invalid(bytes(cut)) else b"\xff" + bytes(cut)
    if kind == 3:
        return b"[" * rng.randrange(100, 3000) + b"]" * rng.randrange(0, 100)
    if kind == 4:
        wrong: list[Any] = [None, 1, "x", [], {}, -3.5, True, "\u0000"]
        return orjson.dumps({"id": rng.choice(wrong + [""]), "nbest": rng.choice(wrong)})
    if kind == 5:
        return orjson.dumps({"id": "x" * rng.randrange(129, 400), "nbest": [{"text": "a"}]})
    return orjson.dumps(message("x", "a", "b") | {"nbest": [{"text": "a", "logprob": rng.uniform(0.1, 50)}]})


def orjson_invalid(payload: bytes) -> bool:
    try:
        orjson.loads(payload)
    except orjson.JSONDecodeError:
        return True
    return False


def test_fuzzed_payloads_are_all_dead_lettered_without_a_crash(broker: Any, tmp_path: Any) -> None:
    path, prefix = make_config(tmp_path, broker, limits={"max_payload_bytes": 8192})
    rng = random.Random(20240611)  # fixed seed: a failure is reproducible
    payloads = [_malformed(rng) for _ in range(300)]

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/nlu/#", f"{prefix}/dead"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", payloads)
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(message("after", "still here"))])
            await down.wait_for(lambda items: len(items) >= len(payloads) + 1, timeout=30)
            assert not relay.task.done()
        assert len(down.on(f"{prefix}/dead")) == len(payloads)
        assert [orjson.loads(item.payload)["id"] for item in down.on(f"{prefix}/nlu/")] == ["after"]

    asyncio.run(scenario())


class _FaultySettings(BaseModel):
    model_config = ConfigDict(extra="forbid")
    sleep_s: float = 0.0


class FaultyStage(PlainStage):
    """Raises on text containing 'explode'; overruns any deadline on text containing 'slow'."""

    name: ClassVar[str] = "faulty"
    Settings: ClassVar[type[BaseModel]] = _FaultySettings
    needs: ClassVar[frozenset[str]] = frozenset({"tokens"})
    finished_slow: ClassVar[threading.Event]  # set by each test on a subclass of its own

    def process(self, utterance: Utterance) -> Utterance:
        if "explode" in utterance.text:
            raise ZeroDivisionError("a bug in a stage")
        if "slow" in utterance.text:
            time.sleep(self.settings.sleep_s)  # the overrun under test, on the thread that runs the chain
            self.finished_slow.set()
        return utterance


@pytest.mark.parametrize("runner", ["thread", "loop"])
def test_stage_errors_and_deadlines_forward_the_original_flagged(broker: Any, tmp_path: Any, runner: str) -> None:
    path, prefix = make_config(tmp_path, broker, stages=["normalize", {"faulty": {"sleep_s": 0.3}}],
                               limits={"deadline_ms": 100, "chain_runner": runner})

    class Faulty(FaultyStage):
        finished_slow = threading.Event()  # this test's own: no earlier run can have set it

    registry = registry_of(Faulty)
    inputs = [message("m-1", "please explode now"), message("m-2", "a slow one"), message("m-3", "Plain words")]

    async def scenario() -> None:
        async with running_relay(load(path, registry)) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(item) for item in inputs])
            await down.wait_for(lambda items: len(items) >= 3)
            # m-4 must find the chain free again: wait until the slow stage has returned.
            assert await asyncio.to_thread(Faulty.finished_slow.wait, 10)
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(message("m-4", "Plain words"))])
            await down.wait_for(lambda items: len(items) >= 4)
            await relay.wait_handled(4)
            samples = await asyncio.to_thread(_scrape, relay.health.address)
        out = {orjson.loads(item.payload)["id"]: orjson.loads(item.payload) for item in down.received}
        assert out["m-1"]["relay"]["passthrough"] == "stage_error"
        assert out["m-1"]["text"] == "please explode now"
        assert out["m-2"]["relay"]["passthrough"] == "deadline"
        if runner == "thread":
            # m-3 waited behind the stuck stage; it went on at its own deadline instead of stalling
            assert out["m-3"]["relay"]["passthrough"] == "deadline"
        else:
            # On the loop the stuck stage holds up m-3's receipt too, so whether m-3's deadline
            # passed depends on when it was read; either way it went on, cleaned or flagged.
            assert (out["m-3"]["relay"].get("passthrough"), out["m-3"]["text"]) in (
                (None, "plain words"), ("deadline", "Plain words"))
        assert "passthrough" not in out["m-4"]["relay"] and out["m-4"]["text"] == "plain words"
        assert samples[("rehear_stage_errors_total", (("stage", "faulty"),))] == 1
        assert samples[("rehear_messages_total", (("outcome", "stage_error"),))] == 1
        assert samples[("rehear_messages_total", (("outcome", "deadline"),))] >= 1

    asyncio.run(scenario())


def test_partial_results_are_forwarded_untouched(broker: Any, tmp_path: Any) -> None:
    path, prefix = make_config(tmp_path, broker)
    partial = orjson.dumps(message("p-1", "Half  a", final=False))

    async def scenario() -> None:
        async with running_relay(load(path)), Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [partial])
            await down.wait_for(lambda items: len(items) >= 1)
        assert down.received[0].payload == partial

    asyncio.run(scenario())


def test_healthz_follows_the_broker_connection(broker: Any, tmp_path: Any) -> None:
    path, _prefix = make_config(tmp_path, broker)

    def status(address: str) -> int:
        try:
            with urllib.request.urlopen(address + "/healthz", timeout=5) as response:
                return int(response.status)
        except urllib.error.HTTPError as exc:
            return int(exc.code)

    async def scenario() -> None:
        async with running_relay(load(path)) as relay:
            address = relay.health.address
            assert await asyncio.to_thread(status, address) == 200
            await asyncio.to_thread(broker.stop)
            await eventually(lambda: not relay.relay.connected, what="relay saw the broker go")
            assert await asyncio.to_thread(status, address) == 503
            await asyncio.to_thread(broker.start)
            await relay.wait_connected()
            assert await asyncio.to_thread(status, address) == 200
            samples = await asyncio.to_thread(_scrape, address)
            assert samples[("rehear_reconnects_total", ())] >= 1

    asyncio.run(scenario())

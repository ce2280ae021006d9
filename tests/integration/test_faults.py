"""The fault probe's findings (issue 12), each replayed against a real mosquitto and counted id by id.

Every test here failed on the relay before the fixes: the finding's number is in its name.
"""

from __future__ import annotations

import asyncio
import logging
import os
import socket
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any, ClassVar

import orjson
import pytest
import yaml

from relay.core.utterance import Utterance
from relay.live.active import Active
from tests.integration.support import (
    Collector,
    edit_config,
    eventually,
    healthz,
    ids,
    load,
    make_config,
    message,
    publish_all,
    running_relay,
)
from tests.paths import ROOT
from tests.plain_stage import PlainStage, registry_of

pytestmark = pytest.mark.broker


class _TestStage(PlainStage):
    needs: ClassVar[frozenset[str]] = frozenset({"tokens"})


class SetTracer(_TestStage):
    """Writes a set into its trace for text holding 'setme': a value JSON cannot carry."""

    name: ClassVar[str] = "set_tracer"

    def process(self, utterance: Utterance) -> Utterance:
        utterance.note(words=set(utterance.text.split()) if "setme" in utterance.text else len(utterance.text))
        return utterance


class Asker(_TestStage):
    """Asks back ("confirm") on text holding 'ask', so a prompt is published."""

    name: ClassVar[str] = "asker"
    provides: ClassVar[frozenset[str]] = frozenset({"decision"})

    def process(self, utterance: Utterance) -> Utterance:
        if "ask" in utterance.text:
            utterance.decision, utterance.prompt = "confirm", f"did you mean {utterance.text}?"
        else:
            utterance.decision = "accept"
        return utterance


# ---- 1: one message stops the relay for good --------------------------------------------------

DEEP = (b'{"id":"p","source":"kiosk-1","nbest":[{"text":"call the office"}],"deep":' + b"[" * 300 + b"]" * 300
        + b"}")


def test_1_messages_that_cannot_be_rendered_are_sent_on_and_the_relay_goes_on(broker: Any, tmp_path: Path) -> None:
    # max_in_flight 4: before the fix, two unacknowledged inputs and four more in flight stopped it
    path, prefix = make_config(tmp_path, broker, stages=["normalize", "set_tracer"], limits={"max_in_flight": 4})
    good = [f"g-{n:02d}" for n in range(30)]
    payloads = [DEEP, orjson.dumps(message("s", "setme please"))] + [orjson.dumps(message(g, "fine words")) for g in good]

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(SetTracer))) as relay, \
                Collector(broker, [f"{prefix}/nlu/#", f"{prefix}/dead"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", payloads)
            await down.wait_for(lambda items: len(items) >= len(payloads))
            await relay.wait_handled(len(payloads))
            status, _ = await asyncio.to_thread(healthz, relay.health.address)
        [dead] = down.on(f"{prefix}/dead")
        assert dead.payload == DEEP and dead.properties["reason"] == "too_deep"
        out = {orjson.loads(item.payload)["id"]: orjson.loads(item.payload) for item in down.on(f"{prefix}/nlu/")}
        assert sorted(out) == sorted(["s", *good])
        assert out["s"]["relay"]["passthrough"] == "stage_error"  # the set is caught where it is written
        assert all("passthrough" not in out[g]["relay"] for g in good)
        assert relay.metric("rehear_dead_letters_total", reason="too_deep") == 1
        assert relay.metric("rehear_stage_errors_total", stage="set_tracer") == 1
        assert relay.metric("rehear_messages_total", outcome="cleaned") == len(good)
        assert relay.metric("rehear_ack_stall_seconds") == 0 and status == 200

    asyncio.run(scenario())


# ---- 2: a control character in a topic value makes the broker drop the relay -----------------

HOSTILE = ["bench\x85", "\uffff", "\ufdd0x", "a\x00b", "tab\there", "\x9f", "\U0010ffff", "+", "#", "a/b/c", "",
           "$SYS", "x" * 300, "caf\u00e9"]


@pytest.mark.parametrize("field", ["speaker", "source"])
def test_2_hostile_topic_values_never_reach_the_broker(broker: Any, tmp_path: Path, field: str) -> None:
    path, prefix = make_config(tmp_path, broker)

    def hostile_topics(config: dict[str, Any]) -> None:
        config["topics"]["output"] = f"{prefix}/nlu/{{source}}/{{speaker}}"
        if field == "source":
            config["topics"]["source_level"] = "none"  # the payload's source, untrusted, goes into the topic
    edit_config(path, hostile_topics)
    bad = [message(f"h-{n:02d}", "hello", **{field: value}) for n, value in enumerate(HOSTILE)]
    good = [message(f"g-{n:03d}", "fine words") for n in range(200)]

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(m) for m in bad + good])
            await down.wait_for(lambda items: len(items) >= len(bad) + len(good), timeout=20)
            await relay.wait_handled(len(bad) + len(good))
            assert relay.metric("rehear_reconnects_total") == 0  # the broker never dropped the relay
        assert sorted(ids(down.received)) == sorted(m["id"] for m in bad + good)
        for item in down.received:
            levels = item.topic.split("/")
            assert len(levels) == 4 and all(levels)  # no value added or emptied a level

    asyncio.run(scenario())


# ---- 3 and 6: least privilege; refused publishes; source tied to the topic ---------------------

def _acl(prefix: str, *, relay_may: list[str]) -> str:
    # mosquitto.conf(5) / mosquitto ACL format: "user" starts a client's block, "topic read|write".
    return "\n".join([
        "user relay", f"topic read {prefix}/asr/#", *[f"topic write {topic}" for topic in relay_may],
        "user bench-1", f"topic write {prefix}/asr/bench-1/nbest",
        "user reader", f"topic read {prefix}/#", "",
    ])


def _acl_broker(make_broker: Any, tmp_path: Path, prefix: str, relay_may: list[str]) -> tuple[Any, Path]:
    acl = tmp_path / "acl"
    acl.write_text(_acl(prefix, relay_may=relay_may))
    return make_broker(extra=f"acl_file {acl}\n"), acl


def test_3_refused_publishes_are_not_acknowledged_and_nothing_is_lost(make_broker: Any, tmp_path: Path) -> None:
    prefix = "acl3"
    broker, acl = _acl_broker(make_broker, tmp_path, prefix, relay_may=[f"{prefix}/nlu/#"])  # no dead, no say
    path, _ = make_config(tmp_path, broker, prefix=prefix, stages=["normalize", "asker"],
                          broker={"username": "relay"}, limits={"publish_attempts": 2, "stall_s": 1.0})
    plain = [f"plain-{n}" for n in range(10)]
    asks = [f"ask-{n}" for n in range(10)]
    bad = [b'{"id": "bad-%d", "nbest": [' % n for n in range(10)]
    payloads: list[bytes] = []
    for n in range(10):
        payloads += [orjson.dumps(message(plain[n], "fine words", source="bench-1")), bad[n],
                     orjson.dumps(message(asks[n], "ask me", source="bench-1"))]

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(Asker))) as relay, \
                Collector(broker, [f"{prefix}/#"], username="reader") as down:
            await publish_all(broker, f"{prefix}/asr/bench-1/nbest", payloads, username="bench-1")
            # The broker answers the dead letter with PUBACK 0x87: counted, not acknowledged upstream
            await eventually(lambda: relay.metric("rehear_messages_total", outcome="publish_refused") >= 1,
                             what="a refused publish counted", timeout=10)
            assert relay.metric("rehear_publish_refused_total", kind="dead_letter", code="0x87") >= 2
            status: list[tuple[int, str]] = []

            async def stalled() -> bool:
                status.append(await asyncio.to_thread(healthz, relay.health.address))
                return "acknowledgements stalled" in status[-1][1]

            for _ in range(100):  # /healthz turns 503 once no acknowledgement went out for stall_s (1 s)
                if await stalled():
                    break
                await asyncio.sleep(0.1)
            assert status[-1][0] == 503 and "acknowledgements stalled" in status[-1][1]
            assert relay.metric("rehear_ack_stall_seconds") > 1.0
            assert not down.on(f"{prefix}/dead") and not down.on(f"{prefix}/say/")
            # The operator grants what the relay needs; the broker reads the ACL again on SIGHUP.
            acl.write_text(_acl(prefix, relay_may=[f"{prefix}/nlu/#", f"{prefix}/say/#", f"{prefix}/dead"]))
            broker.reload()
            await down.wait_for(lambda items: {orjson.loads(i.payload)["id"] for i in items if i.topic.startswith(
                f"{prefix}/nlu/")} >= set(plain + asks) and len(down.on(f"{prefix}/dead")) >= len(bad)
                and len({i.payload for i in down.on(f"{prefix}/say/")}) >= len(asks), timeout=30)
            await eventually(lambda: relay.metric("rehear_ack_stall_seconds") == 0, what="acks advancing again",
                             timeout=10)
        dead = {item.payload for item in down.on(f"{prefix}/dead")}
        assert dead == set(bad)  # every dead letter arrived (duplicates allowed: at-least-once)
        prompts = {orjson.loads(item.payload)["id"] for item in down.on(f"{prefix}/say/")}
        assert prompts == set(asks)
        duplicates = len(down.received) - len(set((i.topic, i.payload) for i in down.received))
        logging.getLogger(__name__).info("at-least-once duplicates after the ACL fix: %d", duplicates)

    asyncio.run(scenario())


def test_6_a_recogniser_cannot_write_into_another_devices_topics(make_broker: Any, tmp_path: Path) -> None:
    prefix = "acl6"
    broker, _acl_file = _acl_broker(make_broker, tmp_path, prefix,
                                    relay_may=[f"{prefix}/nlu/#", f"{prefix}/say/#", f"{prefix}/dead"])
    path, _ = make_config(tmp_path, broker, prefix=prefix, broker={"username": "relay"})
    ignoring = edit_config(tmp_path / "ignore.yaml", lambda c: c["topics"].update(source_mismatch="ignore")) \
        if (tmp_path / "ignore.yaml").write_text(path.read_text()) else None
    assert ignoring is not None
    # bench-1 may publish only on its own input topic (the ACL); its payload claims bench-2
    claims = [message("spoof", "open the door", source="bench-2"), message("no-source", "hello", source=None),
              message("honest", "hello", source="bench-1")]

    async def scenario() -> None:
        async with Collector(broker, [f"{prefix}/#"], username="reader") as down:
            for config in (path, ignoring):
                async with running_relay(load(config)) as relay:
                    await publish_all(broker, f"{prefix}/asr/bench-1/nbest", [orjson.dumps(m) for m in claims],
                                      username="bench-1")
                    await relay.wait_handled(len(claims))
        nlu = [(item.topic, orjson.loads(item.payload)) for item in down.on(f"{prefix}/nlu/")]
        assert not [topic for topic, _ in nlu if "bench-2" in topic]  # never another device's topic
        first, second = nlu[:2], nlu[2:]
        # refuse (default): the spoofed one is a dead letter; the one without a source goes to its
        # own device's level, not to the input topic squashed into one level (finding 9)
        assert [(topic, body["id"]) for topic, body in first] == [
            (f"{prefix}/nlu/bench-1/in", "no-source"), (f"{prefix}/nlu/bench-1/in", "honest")]
        [dead] = down.on(f"{prefix}/dead")
        assert orjson.loads(dead.payload)["id"] == "spoof" and dead.properties["reason"] == "source_mismatch"
        # ignore: the topic's source is used and the claim recorded
        assert [(topic, body["id"], body["source"]) for topic, body in second] == [
            (f"{prefix}/nlu/bench-1/in", "spoof", "bench-1"), (f"{prefix}/nlu/bench-1/in", "no-source", "bench-1"),
            (f"{prefix}/nlu/bench-1/in", "honest", "bench-1")]
        assert second[0][1]["relay"]["claimed_source"] == "bench-2"

    asyncio.run(scenario())


# ---- 5: a valid but expensive message starves everyone ---------------------------------------

def _workshop_config(tmp_path: Path, broker: Any, prefix: str) -> Path:
    config = yaml.safe_load((ROOT / "examples/workshop/relay.yaml").read_text())
    folder = ROOT / "examples/workshop"
    config["broker"] = {"host": broker.host, "port": broker.port, "client_id": f"rehear-{prefix}",
                        "reconnect_min_s": 0.1, "reconnect_max_s": 0.5}
    config["topics"] = {"inputs": [f"{prefix}/+/asr"], "output": f"{prefix}/{{source}}/nlu",
                        "prompt": f"{prefix}/{{source}}/say", "dead_letter": f"{prefix}/dead"}
    config["metrics"] = {"port": 0}
    config["domain"] = {role: str(folder / name) for role, name in config["domain"].items()}
    path = tmp_path / "workshop.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def test_5_an_expensive_message_is_not_cleaned_and_starves_no_one(broker: Any, tmp_path: Path) -> None:
    prefix = "cost5"
    path = _workshop_config(tmp_path, broker, prefix)
    # About 1.6 s of chain CPU before the word limits, with the example configuration.
    expensive = [message(f"big-{n}", " ".join(str(i) for i in range(20_000)), source="bench-1") for n in range(3)]
    good = [message(f"g-{n:02d}", "book the tullow vacuum former for siobhan", source="bench-1") for n in range(30)]
    stream = []
    for n in range(3):
        stream += [expensive[n], *good[n * 10:(n + 1) * 10]]

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/+/nlu"]) as down:
            # about 100 messages a second, as the probe sent them
            await publish_all(broker, f"{prefix}/bench-1/asr", [orjson.dumps(m) for m in stream], gap_s=0.01)
            await down.wait_for(lambda items: len(items) >= len(stream), timeout=30)
            await relay.wait_handled(len(stream))
        out = {orjson.loads(item.payload)["id"]: orjson.loads(item.payload)["relay"] for item in down.received}
        assert sorted(out) == sorted(m["id"] for m in stream)
        assert {out[m["id"]].get("passthrough") for m in expensive} == {"too_long"}
        late = [m["id"] for m in good if out[m["id"]].get("passthrough")]
        assert late == []  # every good message was cleaned within its deadline
        assert relay.metric("rehear_messages_total", outcome="too_long") == len(expensive)

    asyncio.run(scenario())


# ---- 7: overlapping reloads ------------------------------------------------------------------

def test_7_overlapping_reloads_run_one_at_a_time_and_the_last_wins(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker)
    started_a = threading.Event()
    release_a = threading.Event()
    loading = {"now": 0, "most": 0}
    lock = threading.Lock()

    def reloader() -> Active:
        with lock:
            loading["now"] += 1
            loading["most"] = max(loading["most"], loading["now"])
        try:
            text = path.read_text()
            if "rank_decay: 1.1" in text:  # configuration A: its load is slow (held until released)
                started_a.set()
                if not release_a.wait(10):
                    raise TimeoutError("configuration A was never released")
            return load(path)
        finally:
            with lock:
                loading["now"] -= 1

    def write(decay: float) -> None:
        edit_config(path, lambda c: c.update(stages=[{"normalize": {"rank_decay": decay}}]))

    async def scenario() -> None:
        async with running_relay(load(path), reloader=reloader) as relay, \
                Collector(broker, [f"{prefix}/nlu/#"]) as down:
            write(1.1)
            first = asyncio.create_task(relay.relay.reload())
            assert await asyncio.to_thread(started_a.wait, 10)
            write(2.2)  # configuration B, 50 ms later in the probe
            second = asyncio.create_task(relay.relay.reload())
            await asyncio.sleep(0)  # let the second request register before A finishes
            release_a.set()
            results = await asyncio.wait_for(asyncio.gather(first, second), timeout=20)
            hash_b = load(path).loaded.hash
            assert relay.relay.active.loaded.hash == hash_b
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(message("after", "a", "b"))])
            await down.wait_for(lambda items: len(items) >= 1)
        assert results == [True, True]
        assert loading["most"] == 1  # never two loads at once
        assert orjson.loads(down.received[0].payload)["relay"]["config_hash"] == hash_b
        assert relay.metric("rehear_reloads_total", result="superseded") == 1

    asyncio.run(scenario())


# ---- 9: the smaller findings -----------------------------------------------------------------

def test_9_an_oversize_input_is_dead_lettered_capped_with_its_size(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, limits={"max_payload_bytes": 4096, "dead_letter_max_bytes": 1024})
    big = orjson.dumps(message("big", "a" * 10_000))

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/dead"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [big])
            await down.wait_for(lambda items: len(items) >= 1)
            await relay.wait_handled(1)
        [dead] = down.received
        assert dead.payload == big[:1024]  # not republished whole
        assert dead.properties["size"] == str(len(big)) and dead.properties["truncated"] == "true"
        assert dead.properties["reason"] == "oversize"

    asyncio.run(scenario())


def test_9_two_relays_with_one_client_id_say_so(broker: Any, tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    path, _prefix = make_config(tmp_path, broker)

    def taken_over() -> list[str]:
        return [r.getMessage() for r in caplog.records if "connected with the same client_id" in r.getMessage()]

    async def scenario() -> None:
        async with running_relay(load(path)), running_relay(load(path), connect=False):
            # The broker closes the older connection whenever the other one connects (MQTT 5.0
            # section 3.1.4; mosquitto 2.0 sends no DISCONNECT 0x8E, it just closes)
            await eventually(lambda: bool(taken_over()), timeout=20, what="the takeover logged")
        assert f"client_id '{yaml.safe_load(path.read_text())['broker']['client_id']}'" in taken_over()[0]

    asyncio.run(scenario())


class Sleeper(_TestStage):
    """Holds the chain 20 ms per message, like a slow stage in Python would."""

    name: ClassVar[str] = "sleeper"

    def process(self, utterance: Utterance) -> Utterance:
        threading.Event().wait(0.02)  # the stage's work under test: 20 ms on the chain's thread
        return utterance


def test_9_processing_time_leaves_out_the_wait_in_the_queue(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, stages=["normalize", "sleeper"], limits={"deadline_ms": 5000})
    burst = [orjson.dumps(message(f"b-{n:02d}", "words")) for n in range(20)]

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(Sleeper))) as relay, \
                Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", burst)
            await down.wait_for(lambda items: len(items) >= len(burst))
            await relay.wait_handled(len(burst))
        processing = relay.metric("rehear_processing_seconds_sum")
        waiting = relay.metric("rehear_queue_wait_seconds_sum")
        assert relay.metric("rehear_processing_seconds_count") == len(burst)
        # 20 messages x 20 ms of chain: at least 0.4 s of processing; queued one behind the other,
        # the later ones waited for all before them (about 0.4 s x 19 / 2 in total)
        assert 0.4 <= processing < 1.2
        assert waiting > processing

    asyncio.run(scenario())


def test_9_a_metrics_port_in_use_is_an_error_message_not_a_traceback(broker: Any, tmp_path: Path) -> None:
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        path, _prefix = make_config(tmp_path, broker, metrics={"port": port})
        result = subprocess.run([sys.executable, "-m", "relay.cli.run", str(path)], cwd=ROOT, capture_output=True,
                                text=True, timeout=60, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert result.returncode == 1  # the work failed on good input (relay.cli.common)
    assert f"\nrehear run: cannot serve metrics on 127.0.0.1:{port}" in result.stderr
    assert "Traceback" not in result.stderr

"""The chain in worker processes (limits.chain_runner: process), through mosquitto: results,
stage errors and deadlines as with the thread runner, a killed worker loses no input, a
reload builds the new chain in new workers, and stopping the relay ends its workers."""

from __future__ import annotations

import asyncio
import os
import signal
import threading
import time
from pathlib import Path
from typing import Any, ClassVar

import orjson
import pytest
import yaml
from pydantic import BaseModel, ConfigDict

from relay.core.utterance import Utterance
from tests.integration.support import Collector, load, make_config, message, publish_all, running_relay
from tests.plain_stage import PlainStage, registry_of

pytestmark = pytest.mark.broker


class _MarkerSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")
    sleep_s: float = 0.3
    step_s: float = 0.0  # every message costs this much
    tag: str = ""  # noted in the trace: which configuration served a message


class MarkerStage(PlainStage):
    """Raises on "explode", sleeps on "slow", notes the worker's pid on every message."""

    name: ClassVar[str] = "marker"
    Settings: ClassVar[type[BaseModel]] = _MarkerSettings

    def process(self, utterance: Utterance) -> Utterance:
        if "explode" in utterance.text:
            raise ZeroDivisionError("a bug in a stage")
        if "unsendable" in utterance.text:
            utterance.payload = dict(utterance.payload, hook=threading.Lock())  # cannot be pickled
        if "slow" in utterance.text:
            time.sleep(self.settings.sleep_s)
        if self.settings.step_s:
            time.sleep(self.settings.step_s)
        utterance.note(pid=os.getpid(), tag=self.settings.tag)
        return utterance


def _out(items: list[Any]) -> dict[str, dict[str, Any]]:
    return {orjson.loads(item.payload)["id"]: orjson.loads(item.payload) for item in items}


def _pid(result: dict[str, Any]) -> int | None:
    for entry in result.get("trace", []):
        if entry.get("stage") == "marker":
            return int(entry["scores"]["pid"])
    return None


def _tag(result: dict[str, Any]) -> str:
    return next(str(e["scores"]["tag"]) for e in result["trace"] if e["stage"] == "marker")


def test_results_stage_errors_and_deadlines_from_worker_processes(broker: Any, tmp_path: Path) -> None:
    # A deadline a busy machine still meets for the quick messages (at 100 ms, with both cores
    # taken by other work, the erring message itself ran out of time), and a sleep well past it.
    path, prefix = make_config(tmp_path, broker, stages=["normalize", {"marker": {"sleep_s": 1.5}}],
                               limits={"deadline_ms": 1000, "chain_runner": "process", "chain_processes": 2})
    inputs = [message("m-1", "please explode now"), message("m-2", "a slow one"), message("m-3", "Plain words")]

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(MarkerStage))) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(item) for item in inputs])
            await down.wait_for(lambda items: len(items) >= 3)
            await relay.wait_handled(3)
            workers = relay.relay._handler._processes.pids()
            assert relay.metric("rehear_stage_errors_total", stage="marker") == 1
            assert relay.metric("rehear_messages_total", outcome="deadline") == 1
            assert relay.metric("rehear_stage_latency_seconds_count", stage="normalize") >= 1
        out = _out(down.received)
        assert out["m-1"]["relay"]["passthrough"] == "stage_error"
        assert out["m-1"]["text"] == "please explode now"
        assert out["m-2"]["relay"]["passthrough"] == "deadline"
        # the other worker was free: m-3 did not wait behind the slow one
        assert "passthrough" not in out["m-3"]["relay"] and out["m-3"]["text"] == "plain words"
        assert _pid(out["m-3"]) in workers and os.getpid() not in workers
        for pid in workers:  # stopping the relay ended its workers (and collected them)
            with pytest.raises(ChildProcessError):
                os.waitpid(pid, os.WNOHANG)

    asyncio.run(scenario())


def test_messages_go_to_the_worker_that_is_not_stuck(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, stages=["normalize", {"marker": {"sleep_s": 2.0}}],
                               limits={"deadline_ms": 150, "chain_runner": "process", "chain_processes": 2})
    topic = f"{prefix}/asr/kiosk-1/nbest"

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(MarkerStage))) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, topic, [orjson.dumps(message("s-0", "warm up"))])
            await down.wait_for(lambda items: len(items) >= 1)
            await publish_all(broker, topic, [orjson.dumps(message("s-1", "a slow one"))])
            await down.wait_for(lambda items: len(items) >= 2)  # s-1 went on at its deadline
            # s-1's worker is still asleep: every message from now on must go to the other one
            await publish_all(broker, topic, [orjson.dumps(message(f"s-{n}", "plain words")) for n in range(2, 6)],
                              gap_s=0.05)
            await down.wait_for(lambda items: len(items) >= 6)
            await relay.wait_handled(6)
        out = _out(down.received)
        assert out["s-1"]["relay"]["passthrough"] == "deadline"
        assert [out[f"s-{n}"]["relay"].get("passthrough") for n in range(2, 6)] == [None] * 4
        assert len({_pid(out[f"s-{n}"]) for n in range(2, 6)}) == 1

    asyncio.run(scenario())


def test_a_result_that_cannot_be_rendered_goes_on_flagged_and_the_worker_stays(broker: Any, tmp_path: Path) -> None:
    # The worker renders the result itself and sends back bytes: a value no stage should leave
    # in it (here a lock in the payload) fails there, as it fails the thread runner's rendering.
    path, prefix = make_config(tmp_path, broker, stages=["normalize", "marker"],
                               limits={"chain_runner": "process", "chain_processes": 1})
    topic = f"{prefix}/asr/kiosk-1/nbest"

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(MarkerStage))) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, topic, [orjson.dumps(message(ident, text)) for ident, text in (
                ("u-0", "Plain words"), ("u-1", "an unsendable one"), ("u-2", "Plain words"))])
            await down.wait_for(lambda items: len(items) >= 3)
            await relay.wait_handled(3)
            assert relay.metric("rehear_messages_total", outcome="internal_error") == 1
            assert relay.metric("rehear_stage_errors_total", stage="chain") == 0
        out = _out(down.received)
        assert out["u-1"]["relay"]["passthrough"] == "internal_error" and out["u-1"]["text"] == "an unsendable one"
        assert "passthrough" not in out["u-2"]["relay"]
        assert _pid(out["u-0"]) == _pid(out["u-2"])  # the same worker: it did not die on u-1

    asyncio.run(scenario())


def test_a_killed_worker_loses_no_input_and_is_replaced(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, stages=["normalize", {"marker": {"step_s": 0.01}}],
                               limits={"deadline_ms": 5000, "chain_runner": "process", "chain_processes": 2})
    wanted = [f"k-{n:03d}" for n in range(120)]

    async def scenario() -> None:
        async with running_relay(load(path, registry_of(MarkerStage))) as relay, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            publishing = asyncio.create_task(publish_all(
                broker, f"{prefix}/asr/kiosk-1/nbest", [orjson.dumps(message(i, "plain words")) for i in wanted],
                gap_s=0.004))
            await down.wait_for(lambda items: len(items) >= 20)
            first = relay.relay._handler._processes.pids()
            os.kill(first[0], signal.SIGKILL)
            await publishing
            await down.wait_for(lambda items: set(_out(items)) >= set(wanted), timeout=30)
            await relay.wait_handled(len(wanted), timeout=10)
            after = relay.relay._handler._processes.pids()
            assert relay.metric("rehear_messages_total", outcome="cleaned") + relay.metric(
                "rehear_messages_total", outcome="stage_error") == len(wanted)
        out = _out(down.received)
        assert set(out) == set(wanted)
        flagged = [i for i in wanted if out[i]["relay"].get("passthrough")]
        assert {out[i]["relay"]["passthrough"] for i in flagged} <= {"stage_error"}
        assert len(after) == 2 and first[0] not in after and first[1] in after
        replacement = (set(after) - set(first)).pop()
        assert replacement in {_pid(out[i]) for i in wanted[-30:]}  # the new worker took messages

    asyncio.run(scenario())


def test_reload_forks_workers_with_the_new_chain(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, stages=["normalize", {"marker": {"tag": "old"}}],
                               limits={"chain_runner": "process", "chain_processes": 1})
    topic = f"{prefix}/asr/kiosk-1/nbest"

    async def scenario() -> None:
        registry = registry_of(MarkerStage)
        async with running_relay(load(path, registry), reloader=lambda: load(path, registry)) as relay, \
                Collector(broker, [f"{prefix}/nlu/#"]) as down:
            await publish_all(broker, topic, [orjson.dumps(message("r-1", "Some Words"))])
            await down.wait_for(lambda items: len(items) >= 1)
            old = relay.relay._handler._processes.pids()
            config = yaml.safe_load(path.read_text())
            config["stages"] = ["normalize", {"marker": {"tag": "new"}}]
            path.write_text(yaml.safe_dump(config))
            assert await asyncio.wait_for(relay.relay.reload(), timeout=10)
            await publish_all(broker, topic, [orjson.dumps(message("r-2", "Some Words"))])
            await down.wait_for(lambda items: len(items) >= 2)
            new = relay.relay._handler._processes.pids()
            deadline = time.monotonic() + 5
            while time.monotonic() < deadline:  # the old chain's worker exits once it has no job
                try:
                    if os.waitpid(old[0], os.WNOHANG)[0]:
                        break
                except ChildProcessError:
                    break
                await asyncio.sleep(0.05)
            else:
                pytest.fail("the old chain's worker did not exit")
        out = _out(down.received)
        assert new != old
        assert _pid(out["r-1"]) == old[0] and _pid(out["r-2"]) == new[0]
        assert [_tag(out["r-1"]), _tag(out["r-2"])] == ["old", "new"]

    asyncio.run(scenario())

"""Capture through mosquitto: what the relay received and what it published for it, in the files,
in order, with the metric counting them; a relay with capture off writes nothing."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path
from typing import Any

import orjson
import pytest

from relay.live.capture import capture_files
from tests.integration.support import Collector, load, make_config, message, publish_all, running_relay

pytestmark = pytest.mark.broker


def _relay_once(path: Path, prefix: str, broker: Any, payloads: list[bytes]) -> float:
    async def scenario() -> float:
        async with running_relay(load(path)) as running, Collector(broker, [f"{prefix}/#"]) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest", payloads)
            await down.wait_for(lambda items: len([i for i in items if "/asr/" not in i.topic]) >= len(payloads),
                                timeout=20)
            await running.stop()  # the writer is flushed and closed before serve() returns
            return running.metric("rehear_capture_records_total")

    return asyncio.run(scenario())


def test_the_relay_records_what_it_received_and_what_it_sent(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, capture={"enabled": True, "directory": "cap"})
    payloads = [orjson.dumps(message(f"c-{n}", "book the lathe", "look the lathe")) for n in range(5)]
    payloads.append(b"{not json")
    counted = _relay_once(path, prefix, broker, payloads)
    files = capture_files(tmp_path / "cap")
    records = [json.loads(line) for file in files for line in file.read_text().splitlines()]
    assert counted == 6 and len(records) == 6
    cleaned = [r for r in records if r["outcome"] == "cleaned"]
    assert [r["message"]["id"] for r in cleaned] == [f"c-{n}" for n in range(5)]
    assert all(r["topic"] == f"{prefix}/asr/kiosk-1/nbest" for r in records)
    sent = cleaned[0]["sent"][0]
    assert sent["kind"] == "output" and sent["topic"] == f"{prefix}/nlu/kiosk-1/in"
    assert sent["message"]["id"] == "c-0" and "relay" in sent["message"]
    [dead] = [r for r in records if r["outcome"] == "dead_letter"]
    assert dead["payload_text"] == "{not json" and dead["sent"][0]["kind"] == "dead_letter"


def test_capture_is_off_by_default(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker)
    assert _relay_once(path, prefix, broker, [orjson.dumps(message("d-1", "book the lathe"))]) == 0
    assert not (tmp_path / "capture").exists()

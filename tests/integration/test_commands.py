"""The commands as a user runs them: `run` as a process (signals, JSON logs, kill -9) and `demo`."""

from __future__ import annotations

import asyncio
import json
import os
import re
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import orjson
import pytest

from tests.integration.support import (
    Collector,
    LogLines,
    load,
    make_config,
    message,
    publish_all,
    running_relay,
)
from tests.paths import ROOT

pytestmark = pytest.mark.broker


def _start(path: Path, *extra: str) -> subprocess.Popen[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, "-m", "relay.cli.run", str(path), *extra], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _log_lines(process: subprocess.Popen[str]) -> LogLines:
    assert process.stderr is not None
    return LogLines(process.stderr)


def test_run_logs_json_reloads_on_sighup_and_drains_on_sigterm(broker: Any, tmp_path: Path) -> None:
    path, _prefix = make_config(tmp_path, broker, logging={"format": "json", "level": "info"})
    with _start(path) as process:
        log = _log_lines(process)
        try:
            log.wait_for('"msg":"connected"')
            process.send_signal(signal.SIGHUP)
            log.wait_for("configuration reloaded")
            process.send_signal(signal.SIGTERM)
            assert process.wait(timeout=15) == 0
        finally:
            if process.poll() is None:
                process.kill()
        seen = log.rest()
    events = [json.loads(line) for line in seen]  # every line: a log shipper parses them all
    assert events and all({"ts", "level", "logger", "msg"} <= set(event) for event in events)
    assert events[-1]["msg"] == "stopped"


def test_relay_killed_mid_stream_loses_nothing(broker: Any, tmp_path: Path) -> None:
    path, prefix = make_config(tmp_path, broker, logging={"level": "warning"}, limits={"max_in_flight": 16})
    wanted = {f"k-{n:03d}" for n in range(300)}

    async def scenario() -> None:
        async with Collector(broker, [f"{prefix}/nlu/#"]) as down:
            process = _start(path, "--log-level", "info")
            log = _log_lines(process)  # read all along: a full stderr pipe would stall the relay
            try:
                await asyncio.to_thread(log.wait_for, "rehear.service: connected")
                # A paced stream (~1.5 s) so the kill lands in its middle, however fast the relay is.
                publishing = asyncio.create_task(publish_all(
                    broker, f"{prefix}/asr/kiosk-1/nbest",
                    [orjson.dumps(message(ident, "mill slot")) for ident in sorted(wanted)], gap_s=0.005))
                await down.wait_for(lambda items: len(items) >= 30, timeout=20)
                process.kill()  # SIGKILL: no drain, no DISCONNECT
                await asyncio.to_thread(process.wait, 10)
                await publishing
            finally:
                if process.poll() is None:
                    process.kill()
                await asyncio.to_thread(log.rest)  # the reader is done with stderr before it is closed
                process.__exit__(None, None, None)  # closes the pipes
            relayed_before = len(down.received)
            async with running_relay(load(path)):
                await down.wait_for(lambda items: {orjson.loads(i.payload)["id"] for i in items} >= wanted,
                                    timeout=30)
        assert relayed_before < len(wanted)  # the kill really happened mid-stream
        assert {orjson.loads(item.payload)["id"] for item in down.received} == wanted

    asyncio.run(scenario())


def test_demo_runs_end_to_end_on_the_embedded_broker() -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    result = subprocess.run([sys.executable, "-m", "relay.cli.demo", "--interval", "0", "--count", "8"],
                            cwd=ROOT, env=env, capture_output=True, text=True, timeout=90)
    assert result.returncode == 0, result.stdout + result.stderr
    lines = [line for line in (ROOT / "examples/demo/messages.jsonl").read_text().splitlines() if line.strip()]
    assert f"summary of {len(lines) + 8} messages" in result.stdout
    assert "recorded utterances: 8;" in result.stdout
    assert result.stdout.count("said:") == 8  # the recorded corpus is replayed with its references
    # Each decision with the rule and confidence behind it; entities scored against what was said.
    assert re.search(r"sent on: \".*\"  \[(accept|confirm|reprompt) by [a-z_:]+, confidence \d+%\]", result.stdout)
    assert result.stdout.count("      entities: ") == 8
    assert re.search(r"the entities sent on are the ones said in \d+; the text is word for word right in \d+ "
                     r"\(the recogniser's first hypothesis: \d+\)", result.stdout)
    assert "wrong accepts (accepted with the wrong entities): " in result.stdout
    assert "dead letter (too_many_hypotheses)" in result.stdout
    assert "dead letter (invalid_json)" in result.stdout
    assert "partial result, forwarded untouched" in result.stdout
    assert "metrics: http://127.0.0.1:" in result.stdout
    assert "no result" not in result.stdout

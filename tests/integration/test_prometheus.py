"""A real Prometheus server (Debian's prometheus package) scrapes a running relay, and its HTTP
API answers with a rehear metric: the exposition format, names and labels as a server reads them."""

from __future__ import annotations

import asyncio
import json
import subprocess
import time
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any

import orjson
import pytest

from relay.workbench.endtoend import stop_process
from tests.conftest import free_port, program
from tests.integration.support import Collector, load, make_config, message, publish_all, running_relay

pytestmark = pytest.mark.broker


def _query(address: str, expression: str) -> list[dict[str, Any]]:
    url = f"{address}/api/v1/query?" + urllib.parse.urlencode({"query": expression})
    try:
        with urllib.request.urlopen(url, timeout=5) as response:
            body = json.load(response)
    except OSError:
        return []  # not up yet
    assert body["status"] == "success", body
    result: list[dict[str, Any]] = body["data"]["result"]
    return result


def test_a_prometheus_server_scrapes_the_relay(broker: Any, tmp_path: Path) -> None:
    binary = program("prometheus")
    path, prefix = make_config(tmp_path, broker, limits={"max_in_flight": 24})
    port = free_port()
    address = f"http://127.0.0.1:{port}"

    async def scenario() -> list[dict[str, Any]]:
        async with running_relay(load(path)) as running, Collector(broker, [f"{prefix}/nlu/#"]) as down:
            assert running.health is not None
            target = running.health.address.removeprefix("http://")
            (tmp_path / "prometheus.yml").write_text(
                "global: {scrape_interval: 1s, evaluation_interval: 1s}\n"
                f"scrape_configs:\n  - job_name: rehear\n    static_configs: [{{targets: ['{target}']}}]\n")
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest",
                              [orjson.dumps(message(f"p-{n}", "book the lathe")) for n in range(3)])
            await down.wait_for(lambda items: len(items) >= 3, timeout=20)
            log = (tmp_path / "prometheus.log").open("w")
            server = subprocess.Popen(
                [binary, f"--config.file={tmp_path / 'prometheus.yml'}", f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                 f"--web.listen-address=127.0.0.1:{port}"], stdout=subprocess.DEVNULL, stderr=log)
            try:
                end = time.monotonic() + 60  # the server starts, then scrapes every second
                while time.monotonic() < end:
                    found = await asyncio.to_thread(_query, address, 'rehear_messages_total{outcome="cleaned"}')
                    if found and float(found[0]["value"][1]) >= 3:
                        up = await asyncio.to_thread(_query, address, 'up{job="rehear"}')
                        limit = await asyncio.to_thread(_query, address, "rehear_max_in_flight")
                        return [*found, *up, *limit]
                    assert server.poll() is None, (tmp_path / "prometheus.log").read_text()[-2000:]
                    await asyncio.sleep(0.5)
                raise AssertionError("prometheus returned no rehear metric within 60 s:\n"
                                     + (tmp_path / "prometheus.log").read_text()[-2000:])
            finally:
                stop_process(server, timeout=20)
                log.close()

    cleaned, up, limit = asyncio.run(scenario())
    assert cleaned["metric"]["job"] == "rehear" and float(cleaned["value"][1]) == 3.0
    assert up["metric"]["__name__"] == "up" and up["value"][1] == "1"
    assert limit["metric"]["__name__"] == "rehear_max_in_flight" and limit["value"][1] == "24"

from __future__ import annotations

import asyncio

from prometheus_client import CollectorRegistry

from relay.live.health import HealthServer
from relay.live.metrics import Metrics


async def _get(port: int, path: str) -> tuple[int, bytes]:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.write(f"GET {path} HTTP/1.1\r\nHost: x\r\n\r\n".encode())
    data = await reader.read()
    writer.close()
    head, _, body = data.partition(b"\r\n\r\n")
    return int(head.split()[1]), body


def test_healthz_and_metrics() -> None:
    state = {"ok": False}

    async def scenario() -> None:
        registry = CollectorRegistry()
        Metrics(registry)
        server = HealthServer(registry, lambda: (state["ok"], "detail"), port=0)
        await server.start()
        try:
            assert (await _get(server.port, "/healthz"))[0] == 503
            state["ok"] = True
            assert await _get(server.port, "/healthz") == (200, b"detail\n")
            status, body = await _get(server.port, "/metrics")
            assert status == 200 and b"rehear_messages_total" in body
            assert (await _get(server.port, "/nothing"))[0] == 404
        finally:
            await server.stop()

    asyncio.run(scenario())

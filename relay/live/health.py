"""A small HTTP endpoint on the relay's own event loop: ``/metrics`` and ``/healthz``.

It runs on the loop rather than prometheus_client's thread server so /healthz reads the
relay's state without locks, and so one process has one place that binds a port.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

__all__ = ["HealthServer"]

_REASONS = {200: "OK", 404: "Not Found", 405: "Method Not Allowed", 503: "Service Unavailable"}
_MAX_REQUEST_BYTES = 8192


class HealthServer:
    """Serves the registry at /metrics; /healthz answers 200 when ``healthy()`` says so, else 503."""

    def __init__(
        self,
        registry: CollectorRegistry,
        healthy: Callable[[], tuple[bool, str]],
        *,
        host: str = "127.0.0.1",
        port: int = 9464,
        logger: logging.Logger | None = None,
    ) -> None:
        self.registry = registry
        self.healthy = healthy
        self.host = host
        self.port = port
        self._server: asyncio.Server | None = None
        self._logger = logger or logging.getLogger("rehear.health")

    @property
    def address(self) -> str:
        return f"http://{self.host}:{self.port}"

    async def start(self) -> None:
        self._server = await asyncio.start_server(self._serve, self.host, self.port)
        # With port 0 the system picks a free port; report the real one.
        self.port = self._server.sockets[0].getsockname()[1]

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            head = await asyncio.wait_for(reader.readuntil(b"\r\n\r\n"), timeout=5)
            status, content_type, body = self._respond(head[:_MAX_REQUEST_BYTES])
        except (TimeoutError, asyncio.IncompleteReadError, asyncio.LimitOverrunError, ConnectionError):
            writer.close()
            return
        header = (
            f"HTTP/1.1 {status} {_REASONS[status]}\r\nContent-Type: {content_type}\r\n"
            f"Content-Length: {len(body)}\r\nConnection: close\r\n\r\n"
        )
        try:
            writer.write(header.encode("ascii") + body)
            await writer.drain()
        except ConnectionError:
            pass
        finally:
            writer.close()

    def _respond(self, head: bytes) -> tuple[int, str, bytes]:
        parts = head.split(b"\r\n", 1)[0].split()
        method = parts[0] if parts else b""
        path = parts[1].split(b"?", 1)[0] if len(parts) > 1 else b""
        if method not in (b"GET", b"HEAD"):
            return 405, "text/plain; charset=utf-8", b"only GET\n"
        if path == b"/metrics":
            return 200, CONTENT_TYPE_LATEST, generate_latest(self.registry)
        if path == b"/healthz":
            ok, detail = self.healthy()
            return (200 if ok else 503), "text/plain; charset=utf-8", (detail + "\n").encode()
        return 404, "text/plain; charset=utf-8", b"try /metrics or /healthz\n"

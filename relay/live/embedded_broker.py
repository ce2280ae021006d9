"""An MQTT 3.1.1 broker inside the process (amqtt), for the demo on a machine with only Python.

Not for production: it keeps sessions in memory and speaks 3.1.1 only, so relays using it
must set ``broker.protocol: "3.1.1"``.
"""

from __future__ import annotations

import logging
import socket

from amqtt.broker import Broker

__all__ = ["EmbeddedBroker"]


def _free_loopback_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


class EmbeddedBroker:
    """``async with EmbeddedBroker() as broker:`` serves on 127.0.0.1:``broker.port``."""

    host = "127.0.0.1"

    def __init__(self, port: int = 0) -> None:
        self.port = port or _free_loopback_port()
        self._broker: Broker | None = None

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    async def start(self) -> None:
        # amqtt logs every connection at INFO; the demo's output is for a person.
        logging.getLogger("amqtt").setLevel(logging.WARNING)
        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"{self.host}:{self.port}"}},
            "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}},
        }
        self._broker = Broker(config)
        await self._broker.start()

    async def stop(self) -> None:
        if self._broker is not None:
            await self._broker.shutdown()
            self._broker = None

    async def __aenter__(self) -> EmbeddedBroker:
        await self.start()
        return self

    async def __aexit__(self, *exc_info: object) -> None:
        await self.stop()

"""The broker session: one aiomqtt connection set up for at-least-once relaying.

What the relay needs beyond a plain aiomqtt client:

- a persistent session (MQTT 5: clean start off plus a session expiry; 3.1.1: clean session
  off), so input published while the relay is away waits at the broker;
- acknowledgement only after the result is published, in the order the input arrived;
- TCP_NODELAY on the client socket, because Nagle's algorithm costs about 5 ms per hop;
- publish topics rendered from templates whose values can never form a wildcard, an empty
  level, an extra level or a NUL.
"""

from __future__ import annotations

import collections
import logging
import re
import socket
from collections.abc import AsyncIterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from relay.core.errors import TransportError
from relay.core.settings import BrokerSettings

__all__ = ["AckQueue", "Delivery", "Session", "render_topic", "sanitize_level"]

_PLACEHOLDER = re.compile(r"\{(source|speaker|decision)\}")
# Characters that would change the meaning of a topic: wildcards, level separator, NUL.
# Other control characters are replaced too, so a topic always prints on one line.
_UNSAFE = re.compile(r"[+#/\x00-\x1f\x7f]")
_MAX_LEVEL_CHARS = 128
MISSING_VALUE = "_"


def sanitize_level(value: object) -> str:
    """One topic level made from an untrusted value.

    Wildcards, '/', NUL and control characters become '_'; an empty or missing value becomes
    '_'; a leading '$' (reserved for broker topics) becomes '_'; the level is cut to 128 chars;
    text that UTF-8 cannot encode (lone surrogates) is replaced.
    """
    if value is None:
        return MISSING_VALUE
    text = str(value)
    text = text.encode("utf-8", "replace").decode("utf-8", "replace")
    text = _UNSAFE.sub("_", text)[:_MAX_LEVEL_CHARS]
    if text.startswith("$"):
        text = "_" + text[1:]
    return text or MISSING_VALUE


def render_topic(template: str, values: Mapping[str, object]) -> str:
    """Fill ``{source}``, ``{speaker}`` and ``{decision}`` with sanitised values.

    The template itself is checked when the configuration loads (no wildcards, no empty level),
    so with sanitised values the result is always a valid publish topic.
    """
    return _PLACEHOLDER.sub(lambda m: sanitize_level(values.get(m.group(1))), template)


@dataclass(eq=False, slots=True)
class Delivery:
    """One received message and what is needed to acknowledge it on its own connection."""

    topic: str
    payload: bytes
    qos: int
    mid: int
    generation: int
    done: bool = False


@dataclass(slots=True)
class AckQueue:
    """Acknowledges deliveries in arrival order once each one is finished.

    MQTT (3.1.1 and 5.0, section 4.6) asks a receiver to send PUBACKs in the order the PUBLISH
    packets arrived. Work finishes out of order when several messages are in flight, so a
    finished message waits here until every earlier one is finished too.
    """

    pending: collections.deque[Delivery] = field(default_factory=collections.deque)

    def add(self, delivery: Delivery) -> None:
        self.pending.append(delivery)

    def finish(self, delivery: Delivery) -> list[Delivery]:
        """Mark ``delivery`` finished; return the deliveries now ready to acknowledge, in order."""
        delivery.done = True
        ready = []
        while self.pending and self.pending[0].done:
            ready.append(self.pending.popleft())
        return ready

    def clear(self) -> None:
        self.pending.clear()


def _connect_properties(settings: BrokerSettings, receive_maximum: int) -> Properties:
    properties = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
    properties.SessionExpiryInterval = settings.session_expiry_s
    # The broker sends at most this many unacknowledged QoS>0 messages: since input is
    # acknowledged only after its result is out, this is the relay's backpressure.
    properties.ReceiveMaximum = max(1, min(receive_maximum, 65_535))
    return properties


def user_properties(pairs: Mapping[str, str]) -> Properties:
    """MQTT 5 PUBLISH properties carrying ``pairs`` as user properties."""
    properties = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
    properties.UserProperty = [(key, value) for key, value in pairs.items()]
    return properties


class Session:
    """An ``async with`` block around one broker connection.

    Inside it, ``deliveries()`` yields received messages and ``publish``/``ack`` send.
    Reconnecting is the caller's job: leave the block and enter a new Session.
    """

    def __init__(
        self,
        settings: BrokerSettings,
        *,
        subscriptions: Sequence[tuple[str, int]],
        receive_maximum: int,
        generation: int,
        logger: logging.Logger | None = None,
    ) -> None:
        self.settings = settings
        self.subscriptions = list(subscriptions)
        self.generation = generation
        self.v5 = settings.protocol == "5"
        self.acks = AckQueue()
        self._logger = logger or logging.getLogger("rehear.transport")
        options: dict[str, Any] = {}
        if self.v5:
            options["protocol"] = aiomqtt.ProtocolVersion.V5
            # Never start clean: the session (subscriptions and queued input) must survive
            # restarts of the relay for at-least-once delivery.
            options["clean_start"] = False
            options["properties"] = _connect_properties(settings, receive_maximum)
        else:
            options["protocol"] = aiomqtt.ProtocolVersion.V311
            options["clean_session"] = False
        socket_options = [(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)] if settings.tcp_nodelay else []
        self.client = aiomqtt.Client(
            settings.host,
            settings.port,
            identifier=settings.client_id,
            username=settings.username,
            password=settings.password.get_secret_value() if settings.password else None,
            keepalive=settings.keepalive_s,
            socket_options=socket_options,
            logger=self._logger,
            **options,
        )
        # aiomqtt 2.5 has no public switch for application acknowledgements yet (its issue
        # #345); paho, underneath, has. It must be set before connecting: a persistent session
        # redelivers queued input right after CONNACK, and paho would acknowledge it at once.
        # Many publishes wait for their PUBACK at once by design (bounded by max_in_flight).
        self.client.pending_calls_threshold = 3 * receive_maximum + 10
        self._paho = self.client._client
        self._paho.manual_ack_set(True)

    async def __aenter__(self) -> Session:
        try:
            await self.client.__aenter__()
        except aiomqtt.MqttError as exc:
            raise TransportError(
                f"cannot connect to broker {self.settings.host}:{self.settings.port}: {exc}"
            ) from None
        try:
            if self.subscriptions:
                granted = await self.client.subscribe(list(self.subscriptions))
                self._check_granted(granted)
        except BaseException:
            await self.client.__aexit__(None, None, None)
            raise
        return self

    def _check_granted(self, granted: Any) -> None:
        for (topic, _qos), code in zip(self.subscriptions, granted):
            value = code.value if hasattr(code, "value") else int(code)
            if value >= 0x80:
                raise TransportError(f"broker refused subscription {topic!r} (reason code {value:#x})")

    async def __aexit__(self, *exc_info: object) -> None:
        self.acks.clear()
        try:
            await self.client.__aexit__(None, None, None)  # aiomqtt ignores the exception details
        except aiomqtt.MqttError as exc:
            self._logger.debug("disconnect was not clean: %s", exc)

    async def deliveries(self) -> AsyncIterator[Delivery]:
        """Received messages, each registered for in-order acknowledgement."""
        async for message in self.client.messages:
            payload = message.payload
            if not isinstance(payload, bytes):
                payload = bytes(payload) if isinstance(payload, bytearray) else str(payload).encode()
            delivery = Delivery(
                topic=message.topic.value, payload=payload, qos=message.qos,
                mid=message.mid, generation=self.generation,
            )
            if delivery.qos > 0:
                self.acks.add(delivery)
            yield delivery

    async def publish(
        self, topic: str, payload: bytes, *, qos: int, properties: Mapping[str, str] | None = None
    ) -> None:
        """Publish and, for QoS > 0, wait until the broker has taken the message."""
        props = user_properties(properties) if properties and self.v5 else None
        await self.client.publish(topic, payload, qos=qos, properties=props)

    def ack(self, delivery: Delivery) -> None:
        """Mark ``delivery`` finished; send the acknowledgements that are now in order."""
        if delivery.qos == 0 or delivery.generation != self.generation:
            # A delivery from an earlier connection: its packet id may be reused by now, and
            # the broker resends it on this session anyway.
            return
        for ready in self.acks.finish(delivery):
            self._paho.ack(ready.mid, ready.qos)

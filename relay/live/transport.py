"""The broker session: one aiomqtt connection set up for at-least-once relaying.

What the relay needs beyond a plain aiomqtt client:

- a persistent session (MQTT 5: clean start off plus a session expiry; 3.1.1: clean session
  off), so input published while the relay is away waits at the broker;
- acknowledgement only after the result is published, in the order the input arrived;
- the broker's verdict on every publish: under MQTT 5 a PUBACK carries a reason code, and
  0x80 and above (0x87: not authorised) means the message was not taken;
- TCP_NODELAY on the client socket, because Nagle's algorithm costs about 5 ms per hop;
- TLS, and why a connection failed (network, TLS, refused by the broker), for the log and metrics.

aiomqtt 2.5 covers neither manual acknowledgement nor PUBACK reason codes (its publish() drops
the code), so both go through the paho client underneath (``client._client``). That reaches into
aiomqtt's internals: pyproject.toml pins the aiomqtt and paho-mqtt versions this was tested with.
"""

from __future__ import annotations

import asyncio
import collections
import logging
import math
import socket
import ssl
import time
from collections.abc import AsyncIterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiomqtt
import paho.mqtt.client as paho
from aiomqtt.exceptions import MqttConnectError
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from relay.core.errors import PublishRefused, TransportError
from relay.core.settings import BrokerSettings
from relay.live.tls import broker_password, tls_context

__all__ = ["AckQueue", "Delivery", "Session"]

# MQTT 5.0 section 3.14.2.1: the broker closes a connection with 0x8E when another client
# connects with the same client identifier.
SESSION_TAKEN_OVER = 0x8E


@dataclass(eq=False, slots=True)
class Delivery:
    """One received message and what is needed to acknowledge it on its own connection."""

    topic: str
    payload: bytes
    qos: int
    mid: int
    generation: int
    done: bool = False
    received: float = field(default_factory=time.monotonic)


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


def _expire(future: asyncio.Future[Any]) -> None:
    if not future.done():
        future.set_exception(TimeoutError())


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


def _code(reason: Any) -> tuple[int, str]:
    """A paho reason code (ReasonCode object or plain int) as (value, name)."""
    if hasattr(reason, "value"):
        return int(reason.value), str(getattr(reason, "getName", lambda: reason)())
    return int(reason), str(reason)


def _connect_failure(exc: aiomqtt.MqttError, settings: BrokerSettings, tls_error: ssl.SSLError | None) -> TransportError:
    where = f"{settings.host}:{settings.port}"
    if isinstance(exc, MqttConnectError):
        value, name = _code(exc.rc)
        return TransportError(f"broker {where} refused the connection: reason code {value:#04x} ({name})",
                              kind="refused")
    # aiomqtt re-raises paho's socket errors as MqttError(str(exc)) from None; the original is
    # still its __context__.
    cause = exc.__context__ if isinstance(exc.__context__, ssl.SSLError) else tls_error
    if isinstance(cause, ssl.SSLError):
        return TransportError(f"TLS handshake with broker {where} failed: {cause}", kind="tls")
    return TransportError(f"cannot connect to broker {where}: {exc}", kind="network")


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
        base_dir: Path | None = None,
        logger: logging.Logger | None = None,
    ) -> None:
        self.settings = settings
        self.subscriptions = list(subscriptions)
        self.generation = generation
        self.v5 = settings.protocol == "5"
        self.acks = AckQueue()
        self.disconnect_code: int | None = None
        self.disconnect_reason = ""
        self._logger = logger or logging.getLogger("rehear.transport")
        base_dir = base_dir or Path.cwd()
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
        self._tls = tls_context(settings.tls, base_dir)
        socket_options = [(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)] if settings.tcp_nodelay else []
        self.client = aiomqtt.Client(
            settings.host,
            settings.port,
            identifier=settings.client_id,
            username=settings.username,
            password=broker_password(settings, base_dir),
            keepalive=settings.keepalive_s,
            socket_options=socket_options,
            tls_context=self._tls,
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
        self._waiting: dict[int, asyncio.Future[tuple[int, str]]] = {}
        # A PUBACK handled before publish() has registered its future (paho may call back from
        # inside its publish) is kept here for publish() to find.
        self._early: dict[int, tuple[int, str]] = {}
        # A TLS alert from the broker after the handshake (TLS 1.3 sends "certificate required"
        # then) surfaces in paho only as a log line; kept here to name the failure.
        self.tls_error: ssl.SSLError | None = None
        self._chain_callbacks()

    def _chain_callbacks(self) -> None:
        """Put our own PUBACK and DISCONNECT handling in front of aiomqtt's."""
        aiomqtt_on_publish: Any = self._paho.on_publish
        aiomqtt_on_disconnect: Any = self._paho.on_disconnect

        def on_publish(client: Any, userdata: Any, mid: int, reason_code: Any, properties: Any) -> None:
            verdict = _code(reason_code)
            future = self._waiting.pop(mid, None)
            if future is None:
                self._early[mid] = verdict
            elif not future.done():
                future.set_result(verdict)
            aiomqtt_on_publish(client, userdata, mid, reason_code, properties)

        def on_disconnect(client: Any, userdata: Any, flags: Any, reason_code: Any, properties: Any = None) -> None:
            self.disconnect_code, self.disconnect_reason = _code(reason_code)
            self._fail_waiting(f"disconnected ({self.disconnect_reason})")
            connected = self.client._connected
            if not connected.done():
                # Closed before CONNACK (a TLS alert, a broker that hangs up): aiomqtt would wait
                # out its whole timeout before saying so.
                connected.set_exception(aiomqtt.MqttError(f"connection closed before CONNACK ({self.disconnect_reason})"))
            aiomqtt_on_disconnect(client, userdata, flags, reason_code, properties)

        self._paho.on_publish = on_publish
        self._paho.on_disconnect = on_disconnect
        paho_receive = self._paho._sock_recv

        def receive(size: int) -> bytes:
            try:
                data: bytes = paho_receive(size)
            except ssl.SSLError as exc:  # SSLWantRead/Write reach paho as BlockingIOError, not here
                self.tls_error = exc
                raise
            return data

        self._paho._sock_recv = receive  # type: ignore[method-assign,assignment]

    def _fail_waiting(self, why: str) -> None:
        waiting, self._waiting = self._waiting, {}
        for future in waiting.values():
            if not future.done():
                future.set_exception(aiomqtt.MqttError(f"publish not confirmed: {why}"))
        self._early.clear()

    @property
    def taken_over(self) -> bool:
        """Whether the broker closed this session because another client took its client id."""
        return self.disconnect_code == SESSION_TAKEN_OVER

    async def __aenter__(self) -> Session:
        try:
            await self.client.__aenter__()
        except aiomqtt.MqttError as exc:
            if self._tls is not None:
                self._tls.close_failed()
            raise _connect_failure(exc, self.settings, self.tls_error) from None
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
            value, _name = _code(code)
            if value >= 0x80:
                raise TransportError(f"broker refused subscription {topic!r} (reason code {value:#x})",
                                     kind="refused")

    async def __aexit__(self, *exc_info: object) -> None:
        self.acks.clear()
        self._fail_waiting("session closed")
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
        """Publish and, for QoS > 0, wait until the broker has taken the message.

        PublishRefused when the broker answers with a failure reason code (MQTT 5); MqttError
        when the connection breaks or no answer comes within the client's timeout.
        """
        props = user_properties(properties) if properties and self.v5 else None
        info = self._paho.publish(topic, payload, qos, False, props)
        if info.rc != paho.MQTT_ERR_SUCCESS:
            raise aiomqtt.MqttCodeError(info.rc, f"could not publish on {topic!r}")
        if qos == 0:
            return
        verdict = self._early.pop(info.mid, None)
        if verdict is None:
            loop = asyncio.get_running_loop()
            future: asyncio.Future[tuple[int, str]] = loop.create_future()
            self._waiting[info.mid] = future
            # A timer on the future itself rather than asyncio.wait_for, which adds a second
            # future, a callback and one more pass of the loop to every publish.
            timeout = self.client.timeout
            timer = loop.call_later(timeout, _expire, future) if timeout not in (None, math.inf) else None
            try:
                verdict = await future
            except TimeoutError:
                raise aiomqtt.MqttError(f"no PUBACK for {topic!r} within {timeout} s") from None
            finally:
                if timer is not None:
                    timer.cancel()
                if self._waiting.get(info.mid) is future:
                    del self._waiting[info.mid]
        code, reason = verdict
        # MQTT 5.0 section 3.4.2.1: 0x80 and above is a failure; 0x10 (no matching
        # subscribers) is a success. Under 3.1.1 a PUBACK has no code and paho reports 0.
        if code >= 0x80:
            raise PublishRefused(topic, code, reason)

    def ack(self, delivery: Delivery) -> int:
        """Mark ``delivery`` finished; send the acknowledgements that are now in order; how many."""
        if delivery.qos == 0 or delivery.generation != self.generation:
            # A delivery from an earlier connection: its packet id may be reused by now, and
            # the broker resends it on this session anyway.
            return 0
        ready = self.acks.finish(delivery)
        for item in ready:
            self._paho.ack(item.mid, item.qos)
        return len(ready)

"""The running relay: message in -> parse -> chain -> publish -> acknowledge.

Guarantees, in order of importance:

- at-least-once: an input is acknowledged only after everything it produced was accepted by
  the broker; whatever is not acknowledged comes back from the persistent session;
- every input is acknowledged exactly once whatever happens after receipt: bad input goes to
  the dead-letter topic; a stage that raises, a message too long to clean, a deadline passed or
  a fault of the relay itself makes the original go on, flagged. Only a publish that fails or
  that the broker refuses leaves an input unacknowledged, for the broker to deliver again;
- acknowledgements that stop advancing are visible: /healthz turns 503 and
  ``rehear_ack_stall_seconds`` grows;
- bounded work: at most ``limits.max_in_flight`` messages are between receipt and ack, and at
  most ``limits.max_words`` words reach the chain per message;
- reload (SIGHUP) builds and loads the new chain beside the old one and swaps it between
  messages, one reload at a time, the last request winning; stop (SIGTERM) stops reading,
  finishes what is in flight, then disconnects.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import time
from collections.abc import Callable
from pathlib import Path

import aiomqtt

from relay.core.errors import PublishRefused, TransportError
from relay.core.settings import LimitSettings
from relay.live.active import Active, load_active
from relay.live.capture import CaptureWriter
from relay.live.diagnosis import ConnectionDiagnosis
from relay.live.handling import MessageHandler
from relay.live.heap import freeze_loaded, refreeze_when_gone
from relay.live.metrics import OUTCOMES, Metrics
from relay.live.reload import SerialReloads
from relay.live.routing import Outgoing
from relay.live.transport import Delivery, Session
from relay.live.worker import ChainWorker

__all__ = ["Relay"]

_log = logging.getLogger("rehear.service")
# A refused publish is tried again after 0.2, 0.4, 0.8 ... s (at most 5 s): long enough for an
# operator's ACL fix or a broker's transient refusal (0x97 quota exceeded) to pass, short enough
# that the input goes back to the broker soon when it does not.
_RETRY_FIRST_S = 0.2
_RETRY_MAX_S = 5.0


class Relay:
    def __init__(
        self,
        active: Active,
        metrics: Metrics,
        *,
        config_path: str | Path | None = None,
        reloader: Callable[[], Active] | None = None,
        version: str = "0",
        freeze_heap: bool = False,
        capture: CaptureWriter | None = None,
    ) -> None:
        """``freeze_heap``: keep the loaded chain out of the garbage collector's walks (relay.heap);
        for a process that runs one relay, as `rehear run` does."""
        self.active = active
        self.metrics = metrics
        self.version = version
        if reloader is None and config_path is not None:
            path = config_path

            def reloader() -> Active:
                return load_active(path)
        limits = active.loaded.config.limits
        self._slots = asyncio.Semaphore(limits.max_in_flight)
        self._tasks: set[asyncio.Task[None]] = set()
        self._background: set[asyncio.Task[bool]] = set()
        self._freeze_heap = freeze_heap
        self._capture = capture
        self._stopping = asyncio.Event()
        self._broken = asyncio.Event()
        self._worker = ChainWorker()
        self._generation = 0
        self._session: Session | None = None
        self._diagnosis = ConnectionDiagnosis(metrics, active.loaded.config.broker.client_id)
        # Since when input has waited with no acknowledgement going out; None while none waits.
        # Kept across reconnects: an input the broker redelivers again and again is one stall.
        self._waiting_since: float | None = None
        self._reloads = SerialReloads(reloader, self._swap, counted=self._count_reload) if reloader else None
        self.connected = False
        self.metrics.chain_loaded.set(1)
        self.metrics.max_in_flight.set(limits.max_in_flight)
        self.metrics.stall_limit.set(limits.stall_s)
        self.metrics.ack_stall.set_function(self.ack_stall)
        # labels() takes a lock and a dict lookup; the per-message paths use the children directly
        self._outcomes = {outcome: metrics.messages.labels(outcome=outcome) for outcome in OUTCOMES}
        self._handler = MessageHandler(metrics, version=version, worker=self._worker)
        self.metrics.declare_stages(active.chain.names)

    # ---- control -------------------------------------------------------------------------

    def ack_stall(self) -> float:
        """Seconds input has waited without any acknowledgement going out; 0 when none waits.

        A pure read (the gauge and /healthz call it): the wait is forgotten where work ends, in
        _handle and _finished, never here.
        """
        if self._waiting_since is None or self._idle():
            return 0.0
        return time.monotonic() - self._waiting_since

    def _idle(self) -> bool:
        """Connected with nothing in flight and nothing left to acknowledge."""
        return self.connected and not self._tasks and (self._session is None or not self._session.acks.pending)

    def health(self) -> tuple[bool, str]:
        problems = []
        stall = self.ack_stall()
        limit = self.active.loaded.config.limits.stall_s
        if stall > limit:
            problems.append(f"acknowledgements stalled: input has waited {stall:.0f} s (limits.stall_s {limit:g})")
        if not self.connected:
            problems.append(f"broker not connected: {self._diagnosis.problem}")
        if problems:
            return False, "; ".join(problems)
        return True, f"ok: chain {' -> '.join(self.active.chain.names)}, config {self.active.loaded.hash}"

    def request_stop(self) -> None:
        self._stopping.set()

    async def reload(self) -> bool:
        """Build and load the new configuration off the loop, then swap it in between messages.

        One reload at a time, the last request winning (relay.live.reload). True once a
        configuration read after this request is serving; False when it could not be loaded.
        """
        return await self._reloads.request() if self._reloads is not None else False

    def _count_reload(self, result: str) -> None:
        self.metrics.reloads.labels(result=result).inc()

    def _swap(self, new: Active) -> None:
        old = self.active.loaded.config
        if new.loaded.config.broker != old.broker or new.loaded.config.topics.inputs != old.topics.inputs:
            _log.warning("broker settings and input topics change only on restart")
        self.metrics.declare_stages(new.chain.names)
        self.metrics.stall_limit.set(new.loaded.config.limits.stall_s)
        replaced = self.active.chain
        self.active = new  # messages already running keep the chain they started with
        if self._freeze_heap:
            refreeze = asyncio.create_task(refreeze_when_gone(replaced, timeout_s=new.loaded.config.limits.drain_s))
            self._background.add(refreeze)
            refreeze.add_done_callback(self._background.discard)
        del replaced
        _log.info("configuration reloaded", extra={"fields": {"config_hash": new.loaded.hash,
                                                              "stages": ",".join(new.chain.names)}})

    # ---- connection loop -----------------------------------------------------------------

    async def run(self) -> None:
        """Connect, relay, reconnect with backoff; return after a requested stop has drained."""
        broker = self.active.loaded.config.broker
        delay = broker.reconnect_min_s
        if self._freeze_heap:
            freeze_loaded()
        try:
            while not self._stopping.is_set():
                self._generation += 1
                if self._generation > 1:
                    self.metrics.reconnects.inc()
                try:
                    await self._connection(self._generation)
                    delay = broker.reconnect_min_s
                except TransportError as exc:
                    self._diagnosis.failed(exc)
                except aiomqtt.MqttError as exc:
                    self._connection_lost(exc)
                if self._stopping.is_set():
                    break
                wait = delay * random.uniform(0.8, 1.2)  # jitter: instances must not reconnect in step
                _log.info("reconnecting", extra={"fields": {"in_s": round(wait, 2)}})
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._stopping.wait(), timeout=wait)
                delay = min(delay * 2, broker.reconnect_max_s)
        finally:
            self._handler.shutdown()

    def _connection_lost(self, exc: aiomqtt.MqttError) -> None:
        session = self._session
        self._diagnosis.lost(exc, taken_over=session is not None and session.taken_over,
                             reason=session.disconnect_reason if session is not None else "")

    async def _connection(self, generation: int) -> None:
        loaded = self.active.loaded
        config = loaded.config
        subscriptions = [(topic, config.topics.input_qos) for topic in config.topics.inputs]
        session = Session(config.broker, subscriptions=subscriptions, base_dir=loaded.base_dir,
                          receive_maximum=config.limits.max_in_flight, generation=generation)
        self._session = session
        async with session:
            self._diagnosis.connected()
            self.connected = True
            self.metrics.broker_connected.set(1)
            self._broken.clear()
            _log.info("connected", extra={"fields": {"broker": f"{config.broker.host}:{config.broker.port}",
                                                     "protocol": config.broker.protocol,
                                                     "tls": config.broker.tls.enabled,
                                                     "inputs": ",".join(config.topics.inputs)}})
            try:
                await self._consume(session)
            finally:
                self.connected = False
                self.metrics.broker_connected.set(0)

    async def _consume(self, session: Session) -> None:
        reader = asyncio.create_task(self._read(session))
        stop = asyncio.create_task(self._stopping.wait())
        broken = asyncio.create_task(self._broken.wait())
        try:
            await asyncio.wait({reader, stop, broken}, return_when=asyncio.FIRST_COMPLETED)
        finally:
            for task in (reader, stop, broken):
                task.cancel()
        if self._stopping.is_set():
            await self._drain()
        else:
            for task in list(self._tasks):
                task.cancel()  # their input was not acknowledged; the broker resends it
            await asyncio.gather(*self._tasks, return_exceptions=True)
        if not reader.cancelled() and reader.done() and reader.exception() is not None:
            raise reader.exception()  # type: ignore[misc]
        if self._broken.is_set() and not self._stopping.is_set():
            raise TransportError("a publish failed or was refused; reconnecting so the broker resends "
                                 "unacknowledged input", kind="publish")

    async def _drain(self) -> None:
        if not self._tasks:
            return
        timeout = self.active.loaded.config.limits.drain_s
        _log.info("draining", extra={"fields": {"in_flight": len(self._tasks)}})
        _done, pending = await asyncio.wait(set(self._tasks), timeout=timeout)
        for task in pending:
            task.cancel()
        if pending:
            _log.warning("drain timed out; unacknowledged input will be redelivered",
                         extra={"fields": {"left": len(pending)}})

    async def _read(self, session: Session) -> None:
        async for delivery in session.deliveries():
            if self._waiting_since is None:
                self._waiting_since = delivery.received
            await self._slots.acquire()
            task = asyncio.create_task(self._handle(session, delivery))
            self._tasks.add(task)
            task.add_done_callback(self._finished)

    def _finished(self, task: asyncio.Task[None]) -> None:
        self._tasks.discard(task)
        if self._idle():
            self._waiting_since = None  # everything that waited was acknowledged or went back

    # ---- one message ---------------------------------------------------------------------

    async def _handle(self, session: Session, delivery: Delivery) -> None:
        self.metrics.in_flight.inc()
        active = self.active
        try:
            try:
                outcome, outgoing = await self._handler.process(active, delivery, session.v5)
            except Exception as exc:  # noqa: BLE001 - whatever went wrong, the input must not stay unacknowledged
                outcome, outgoing = self._handler.internal_error(active, delivery, exc, session.v5)
            for message in outgoing:
                await self._publish(session, message, active.loaded.config.limits)
            if session.ack(delivery) or not session.acks.pending:
                # acknowledgements advanced: whatever still waits has waited from now
                self._waiting_since = time.monotonic() if session.acks.pending else None
            self._outcomes[outcome].inc()
            self.metrics.latency.observe(time.monotonic() - delivery.received)
            if self._capture is not None:
                self._capture.record(time.time(), delivery.topic, delivery.payload, outcome, outgoing)
        except PublishRefused as exc:
            self._outcomes["publish_refused"].inc()
            _log.error("the broker refused a publish; the input stays unacknowledged and will be delivered again",
                       extra={"fields": {"topic": exc.topic, "code": f"{exc.code:#04x}", "reason": exc.reason,
                                         "input_topic": delivery.topic}})
            self._broken.set()
        except aiomqtt.MqttError as exc:
            self._outcomes["publish_failed"].inc()
            _log.warning("publish failed", extra={"fields": {"topic": delivery.topic, "error": str(exc)}})
            self._broken.set()
        finally:
            self.metrics.in_flight.dec()
            self._slots.release()

    async def _publish(self, session: Session, message: Outgoing, limits: LimitSettings) -> None:
        """Publish, trying again with backoff while the broker refuses; PublishRefused after
        ``limits.publish_attempts`` refusals."""
        pause = _RETRY_FIRST_S
        for attempt in range(1, limits.publish_attempts + 1):
            try:
                await session.publish(message.topic, message.payload, qos=message.qos, properties=message.properties)
                return
            except PublishRefused as exc:
                self.metrics.publish_refused.labels(kind=message.kind, code=f"{exc.code:#04x}").inc()
                if attempt == limits.publish_attempts:
                    raise
                _log.warning("the broker refused a publish; trying again",
                             extra={"fields": {"topic": exc.topic, "code": f"{exc.code:#04x}", "reason": exc.reason,
                                               "attempt": attempt, "in_s": pause}})
                await asyncio.sleep(pause)
                pause = min(pause * 2, _RETRY_MAX_S)


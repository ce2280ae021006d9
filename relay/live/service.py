"""The running relay: message in -> parse -> chain -> publish -> acknowledge.

Guarantees, in order of importance:

- at-least-once: an input is acknowledged only after everything it produced was accepted by
  the broker; whatever is not acknowledged comes back from the persistent session;
- nothing unusable stops the relay: bad input goes to the dead-letter topic, a stage that
  raises or overruns the deadline makes the original go on flagged;
- bounded work: at most ``limits.max_in_flight`` messages are between receipt and ack;
- reload (SIGHUP) builds and loads the new chain beside the old one and swaps it between
  messages; stop (SIGTERM) stops reading, finishes what is in flight, then disconnects.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiomqtt

from relay.core.chain import Chain
from relay.core.config import LoadedConfig, build_chain, load_config
from relay.core.errors import DeadlineExceeded, InputError, RehearError, TransportError
from relay.core.utterance import Utterance
from relay.live.heap import freeze_loaded, refreeze_when_gone
from relay.live.messages import parse_message
from relay.live.metrics import OUTCOMES, Metrics
from relay.live.routing import Outgoing, cleaned, dead_letter, is_final, partial, passthrough
from relay.live.transport import Delivery, Session
from relay.live.worker import ChainWorker

__all__ = ["Active", "Relay", "load_active"]

_log = logging.getLogger("rehear.service")


@dataclass(frozen=True, slots=True)
class Active:
    """A configuration with its loaded chain; replaced as a whole on reload."""

    loaded: LoadedConfig
    chain: Chain


def load_active(path: str | Path, *, progress: bool = False) -> Active:
    """Read, validate, build and load; slow (stages load models), so run it off the loop."""
    loaded = load_config(path)
    chain = build_chain(loaded, progress=progress)
    chain.load()
    return Active(loaded, chain)


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
        self._reloader = reloader
        limits = active.loaded.config.limits
        self._slots = asyncio.Semaphore(limits.max_in_flight)
        self._tasks: set[asyncio.Task[None]] = set()
        self._background: set[asyncio.Task[bool]] = set()
        self._freeze_heap = freeze_heap
        self._stopping = asyncio.Event()
        self._broken = asyncio.Event()
        self._worker = ChainWorker()
        self._generation = 0
        self.connected = False
        self.metrics.chain_loaded.set(1)
        # labels() takes a lock and a dict lookup; the per-message paths use the children directly
        self._outcomes = {outcome: metrics.messages.labels(outcome=outcome) for outcome in OUTCOMES}
        self._stage_latency: dict[str, Any] = {}
        self._corrections: dict[str, Any] = {}
        self._decisions: dict[str, Any] = {}
        self.metrics.declare_stages(active.chain.names)

    # ---- control -------------------------------------------------------------------------

    def health(self) -> tuple[bool, str]:
        if not self.connected:
            return False, "broker not connected"
        return True, f"ok: chain {' -> '.join(self.active.chain.names)}, config {self.active.loaded.hash}"

    def request_stop(self) -> None:
        self._stopping.set()

    async def reload(self) -> bool:
        """Build and load the new configuration off the loop, then swap it in between messages."""
        if self._reloader is None:
            return False
        try:
            new = await asyncio.get_running_loop().run_in_executor(None, self._reloader)
        except RehearError as exc:
            self.metrics.reloads.labels(result="failed").inc()
            _log.error("reload failed; the current chain keeps running\n%s", exc)
            return False
        old = self.active.loaded.config
        if new.loaded.config.broker != old.broker or new.loaded.config.topics.inputs != old.topics.inputs:
            _log.warning("broker settings and input topics change only on restart")
        self.metrics.declare_stages(new.chain.names)
        replaced = self.active.chain
        self.active = new  # messages already running keep the chain they started with
        if self._freeze_heap:
            refreeze = asyncio.create_task(refreeze_when_gone(replaced, timeout_s=new.loaded.config.limits.drain_s))
            self._background.add(refreeze)
            refreeze.add_done_callback(self._background.discard)
        del replaced
        self.metrics.reloads.labels(result="ok").inc()
        _log.info("configuration reloaded", extra={"fields": {"config_hash": new.loaded.hash,
                                                              "stages": ",".join(new.chain.names)}})
        return True

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
                    await self._session(self._generation)
                    delay = broker.reconnect_min_s
                except (TransportError, aiomqtt.MqttError) as exc:
                    _log.warning("broker connection lost or refused", extra={"fields": {"error": str(exc)}})
                if self._stopping.is_set():
                    break
                wait = delay * random.uniform(0.8, 1.2)  # jitter: instances must not reconnect in step
                _log.info("reconnecting", extra={"fields": {"in_s": round(wait, 2)}})
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._stopping.wait(), timeout=wait)
                delay = min(delay * 2, broker.reconnect_max_s)
        finally:
            self._worker.shutdown()

    async def _session(self, generation: int) -> None:
        config = self.active.loaded.config
        subscriptions = [(topic, config.topics.input_qos) for topic in config.topics.inputs]
        session = Session(config.broker, subscriptions=subscriptions,
                          receive_maximum=config.limits.max_in_flight, generation=generation)
        async with session:
            self.connected = True
            self.metrics.broker_connected.set(1)
            self._broken.clear()
            _log.info("connected", extra={"fields": {"broker": f"{config.broker.host}:{config.broker.port}",
                                                     "protocol": config.broker.protocol,
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
            raise TransportError("a publish failed; reconnecting so the broker resends unacknowledged input")

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
            await self._slots.acquire()
            task = asyncio.create_task(self._handle(session, delivery))
            self._tasks.add(task)
            task.add_done_callback(self._tasks.discard)

    # ---- one message ---------------------------------------------------------------------

    async def _handle(self, session: Session, delivery: Delivery) -> None:
        received = time.monotonic()
        self.metrics.in_flight.inc()
        try:
            outcome, outgoing = await self._process(self.active, delivery, received, session.v5)
            for message in outgoing:
                await session.publish(message.topic, message.payload, qos=message.qos,
                                      properties=message.properties)
            session.ack(delivery)
            self._outcomes[outcome].inc()
            self.metrics.latency.observe(time.monotonic() - received)
        except aiomqtt.MqttError as exc:
            self._outcomes["publish_failed"].inc()
            _log.warning("publish failed", extra={"fields": {"topic": delivery.topic, "error": str(exc)}})
            self._broken.set()
        finally:
            self.metrics.in_flight.dec()
            self._slots.release()

    async def _process(
        self, active: Active, delivery: Delivery, received: float, v5: bool
    ) -> tuple[str, list[Outgoing]]:
        config = active.loaded.config
        topics = config.topics
        try:
            utterance = parse_message(
                delivery.payload, topic=delivery.topic, field_map=config.fields,
                max_payload_bytes=config.limits.max_payload_bytes, max_hypotheses=config.limits.max_hypotheses,
            )
        except Exception as exc:  # noqa: BLE001 - whatever the payload, the relay goes on
            if not isinstance(exc, InputError):
                exc = InputError("schema", f"topic {delivery.topic}: unreadable message ({type(exc).__name__})")
            self.metrics.dead_letters.labels(reason=exc.reason).inc()
            _log.info("dead letter", extra={"fields": {"reason": exc.reason, "detail": exc.detail}})
            return "dead_letter", [dead_letter(delivery.topic, delivery.payload, exc, topics, v5=v5)]
        if not is_final(utterance):
            return "partial", [partial(utterance, delivery.payload, topics)]
        relay = {"version": self.version, "config_hash": active.loaded.hash,
                 "received_at": time.time() - (time.monotonic() - received)}
        deadline = received + config.limits.deadline_ms / 1000
        try:
            utterance = await self._run_chain(active, utterance, deadline, config.limits.chain_runner)
            if time.monotonic() > deadline:  # the last stage overran: the result is too late
                raise DeadlineExceeded(utterance.trace[-1].stage if utterance.trace else "chain",
                                       (time.monotonic() - received) * 1000)
        except (TimeoutError, DeadlineExceeded):
            _log.warning("deadline passed; forwarding the original",
                         extra={"fields": {"id": utterance.id, "deadline_ms": config.limits.deadline_ms}})
            return "deadline", [passthrough(utterance, topics, relay, "deadline")]
        except Exception as exc:  # noqa: BLE001 - a stage bug must not stop the relay
            return self._stage_failed(utterance, exc, topics, relay)
        self._observe(utterance)
        self.metrics.processing.observe(time.monotonic() - received)
        return "cleaned", cleaned(utterance, topics, relay)

    async def _run_chain(self, active: Active, utterance: Utterance, deadline: float, runner: str) -> Utterance:
        if runner == "loop":
            return active.chain.process(utterance, deadline=deadline)
        chain = active.chain
        result: Utterance = await self._worker.run(lambda: chain.process(utterance, deadline=deadline), deadline)
        return result

    def _stage_failed(
        self, utterance: Utterance, exc: BaseException, topics: Any, relay: dict[str, Any]
    ) -> tuple[str, list[Outgoing]]:
        stage = utterance.trace[-1].stage if utterance.trace else "chain"
        self.metrics.stage_errors.labels(stage=stage).inc()
        _log.error("stage failed; forwarding the original", exc_info=exc,
                   extra={"fields": {"stage": stage, "id": utterance.id}})
        return "stage_error", [passthrough(utterance, topics, relay, "stage_error")]

    def _observe(self, utterance: Utterance) -> None:
        for entry in utterance.trace:
            child = self._stage_latency.get(entry.stage)
            if child is None:
                child = self._stage_latency[entry.stage] = self.metrics.stage_latency.labels(stage=entry.stage)
            child.observe(entry.elapsed_us / 1e6)
        for correction in utterance.corrections:
            counter = self._corrections.get(correction.stage)
            if counter is None:
                counter = self._corrections[correction.stage] = self.metrics.corrections.labels(stage=correction.stage)
            counter.inc()
        decision = utterance.decision or "none"
        counter = self._decisions.get(decision)
        if counter is None:
            counter = self._decisions[decision] = self.metrics.decisions.labels(decision=decision)
        counter.inc()

"""One message, from its bytes to what goes out for it: parse, bind its source to the topic,
run the chain, render; dead letters and flagged originals when any step fails. No network here:
the service publishes what ``MessageHandler.process`` returns, then acknowledges the input."""

from __future__ import annotations

import logging
import time
from typing import Any

from relay.core.errors import DeadlineExceeded, InputError
from relay.core.settings import LimitSettings, TopicSettings
from relay.core.utterance import Utterance
from relay.live.active import Active
from relay.live.messages import parse_message, word_load
from relay.live.metrics import Metrics
from relay.live.processes import ProcessRunner
from relay.live.routing import (
    Outgoing,
    Rendered,
    RenderError,
    dead_letter,
    is_final,
    outgoing,
    partial,
    passthrough,
    render,
)
from relay.live.topics import source_from_topic
from relay.live.transport import Delivery
from relay.live.worker import ChainWorker

__all__ = ["MessageHandler"]

_log = logging.getLogger("rehear.service")


class _Timing:
    """When the chain started and ended for one message, written on the thread that runs it."""

    __slots__ = ("ended", "started")

    def __init__(self) -> None:
        self.started = 0.0
        self.ended = 0.0


class MessageHandler:
    """Turns one delivery into its outcome and the messages to publish for it."""

    def __init__(self, metrics: Metrics, *, version: str, worker: ChainWorker) -> None:
        self.metrics = metrics
        self.version = version
        self._worker = worker
        self._processes = ProcessRunner()  # forks workers only when chain_runner is process
        # labels() takes a lock and a dict lookup; the per-message paths use the children directly
        self._stage_latency: dict[str, Any] = {}
        self._corrections: dict[str, Any] = {}
        self._decisions: dict[str, Any] = {}

    def internal_error(
        self, active: Active, delivery: Delivery, exc: BaseException, v5: bool
    ) -> tuple[str, list[Outgoing]]:
        """The original, unchanged, to the dead-letter topic: whatever failed may fail again on any
        rendering of the message, and the raw bytes with a reason always publish."""
        config = active.loaded.config
        _log.error("failed on a message after receipt; sending it on as a dead letter", exc_info=exc,
                   extra={"fields": {"topic": delivery.topic}})
        self.metrics.dead_letters.labels(reason="internal_error").inc()
        error = InputError("internal_error", f"topic {delivery.topic}: the relay failed on it ({type(exc).__name__})")
        return "internal_error", [dead_letter(delivery.topic, delivery.payload, error, config.topics, v5=v5,
                                              max_bytes=config.limits.dead_letter_max_bytes)]

    def _dead(self, delivery: Delivery, error: InputError, config: Any, v5: bool) -> tuple[str, list[Outgoing]]:
        self.metrics.dead_letters.labels(reason=error.reason).inc()
        _log.info("dead letter", extra={"fields": {"reason": error.reason, "detail": error.detail}})
        return "dead_letter", [dead_letter(delivery.topic, delivery.payload, error, config.topics, v5=v5,
                                           max_bytes=config.limits.dead_letter_max_bytes)]

    async def process(self, active: Active, delivery: Delivery, v5: bool) -> tuple[str, list[Outgoing]]:
        config = active.loaded.config
        topics, limits = config.topics, config.limits
        began = time.monotonic()
        try:
            utterance = parse_message(
                delivery.payload, topic=delivery.topic, field_map=config.fields,
                max_payload_bytes=limits.max_payload_bytes, max_hypotheses=limits.max_hypotheses,
            )
            relay: dict[str, Any] = {"version": self.version, "config_hash": active.loaded.hash,
                                     "received_at": time.time() - (time.monotonic() - delivery.received)}
            self._bind_source(utterance, delivery.topic, topics, relay)
        except InputError as exc:
            return self._dead(delivery, exc, config, v5)
        except Exception as exc:  # noqa: BLE001 - whatever the payload, the relay goes on
            error = InputError("schema", f"topic {delivery.topic}: unreadable message ({type(exc).__name__})")
            return self._dead(delivery, error, config, v5)
        if not is_final(utterance):
            return "partial", [partial(utterance, delivery.payload, topics)]
        most, total = word_load([h.text for h in utterance.nbest], max_word_chars=limits.max_word_chars)
        if most > limits.max_words_per_hypothesis or total > limits.max_words:
            _log.warning("too many words to clean; forwarding the original",
                         extra={"fields": {"id": utterance.id, "words": total, "most_in_one": most}})
            return "too_long", [passthrough(utterance, topics, relay, "too_long")]
        parsed = time.monotonic()
        deadline = delivery.received + limits.deadline_ms / 1000
        timing = _Timing()
        try:
            # The chain runs and the result is rendered where the runner puts them (a worker
            # process or thread): the relay gets back bytes and the few values it counts.
            rendered = await self._run_chain(active, utterance, deadline, limits, timing, relay)
            if time.monotonic() > deadline:  # the last stage overran: the result is too late
                raise DeadlineExceeded(rendered.last_stage, (time.monotonic() - delivery.received) * 1000)
        except (TimeoutError, DeadlineExceeded):
            _log.warning("deadline passed; forwarding the original",
                         extra={"fields": {"id": utterance.id, "deadline_ms": limits.deadline_ms}})
            return "deadline", [passthrough(utterance, topics, relay, "deadline")]
        except RenderError as exc:  # e.g. a value no stage should have left in the result
            _log.error("cannot render the cleaned message; forwarding the original",
                       extra={"fields": {"id": utterance.id, "detail": str(exc)}})
            return "internal_error", [passthrough(utterance, topics, relay, "internal_error")]
        except Exception as exc:  # noqa: BLE001 - a stage bug must not stop the relay
            return self._stage_failed(utterance, exc, topics, relay)
        publishing = time.monotonic()
        out = outgoing(rendered, topics)
        self._observe(rendered)
        if timing.started:
            self.metrics.queue_wait.observe(max(0.0, timing.started - parsed))
            chain_s = timing.ended - timing.started  # the chain and the rendering
        else:
            chain_s = publishing - parsed
        self.metrics.processing.observe((parsed - began) + chain_s + (time.monotonic() - publishing))
        return "cleaned", out

    def _bind_source(self, utterance: Utterance, topic: str, topics: TopicSettings, relay: dict[str, Any]) -> None:
        """Take the source from the input topic when the configuration says where it is there.

        The broker's ACL decides who may publish on which topic, never what a payload claims: a
        recogniser allowed only its own device's topic must not reach another device's output.
        """
        from_topic = source_from_topic(topic, topics.inputs, topics.source_level)
        if from_topic is None:
            return
        claimed = utterance.payload.get("source")
        if claimed == from_topic:
            return
        if claimed is not None:
            if topics.source_mismatch == "refuse":
                raise InputError("source_mismatch", f"topic {topic}: field source {str(claimed)[:80]!r} is not the "
                                                    f"topic's source {from_topic!r}")
            relay["claimed_source"] = claimed
        # FORMATS section 1: source defaults to the topic; the cleaned message says which it was
        utterance.payload = dict(utterance.payload, source=from_topic)
        utterance.source = from_topic

    def shutdown(self) -> None:
        """Stop the chain's worker thread and worker processes."""
        self._worker.shutdown()
        self._processes.shutdown()

    async def _run_chain(
        self, active: Active, utterance: Utterance, deadline: float, limits: LimitSettings, timing: _Timing,
        relay: dict[str, Any],
    ) -> Rendered:
        chain = active.chain
        runner = limits.chain_runner
        forward_unsure = active.loaded.config.topics.forward_unsure
        if runner == "process":
            done, timing.started, timing.ended = await self._processes.run(
                chain, utterance, deadline, relay, forward_unsure=forward_unsure, processes=limits.chain_processes)
            return done

        def job() -> Rendered:
            timing.started = time.monotonic()
            try:
                return render(chain.process(utterance, deadline=deadline), relay, forward_unsure=forward_unsure)
            finally:
                timing.ended = time.monotonic()

        if runner == "loop":
            return job()
        result: Rendered = await self._worker.run(job, deadline)
        return result

    def _stage_failed(
        self, utterance: Utterance, exc: BaseException, topics: Any, relay: dict[str, Any]
    ) -> tuple[str, list[Outgoing]]:
        stage = getattr(exc, "stage", None) or utterance.last_stage
        self.metrics.stage_errors.labels(stage=stage).inc()
        _log.error("stage failed; forwarding the original", exc_info=exc,
                   extra={"fields": {"stage": stage, "id": utterance.id}})
        return "stage_error", [passthrough(utterance, topics, relay, "stage_error")]

    def _observe(self, rendered: Rendered) -> None:
        metrics = self.metrics
        for stage, elapsed_us in rendered.stage_us:
            _child(self._stage_latency, metrics.stage_latency, stage).observe(elapsed_us / 1e6)
        for stage in rendered.corrections:
            _child(self._corrections, metrics.corrections, stage).inc()
        _child(self._decisions, metrics.decisions, rendered.decision or "none").inc()


def _child(children: dict[str, Any], metric: Any, value: str) -> Any:
    """``metric``'s child for its one label set to ``value``, kept in ``children``."""
    child = children.get(value)
    if child is None:
        child = children[value] = metric.labels(value)
    return child

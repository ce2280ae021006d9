"""Every metric the relay exports, defined in one place on a registry that is passed in.

Names follow the Prometheus conventions: prefix ``rehear_``, base units (seconds), ``_total``
on counters. Label values are bounded: outcomes, reasons and decisions are closed sets, stage
names come from the configuration; ids, topics and text never become labels.
"""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

__all__ = ["CONNECT_FAILURES", "DEAD_LETTER_REASONS", "LATENCY_BUCKETS", "LOOP_LAG_BUCKETS", "OUTCOMES",
           "PUBLISH_KINDS", "Metrics"]

# From 100 us (a pass-through stage) to 1 s (far past any sane deadline).
LATENCY_BUCKETS = (
    0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0,
)

OUTCOMES = (
    "cleaned",  # the chain ran and its result was published
    "partial",  # a non-final result, forwarded untouched
    "deadline",  # the deadline passed; the original went on, flagged
    "stage_error",  # a stage raised; the original went on, flagged
    "too_long",  # more words than limits allow; the original went on, flagged, without the chain
    "internal_error",  # the relay itself failed after receipt; the original went on, flagged
    "dead_letter",  # unusable input, sent to the dead-letter topic
    "publish_failed",  # the result could not be published; the broker will redeliver
    "publish_refused",  # the broker refused a publish (MQTT 5 reason code); the broker will redeliver
)

DEAD_LETTER_REASONS = ("oversize", "not_utf8", "invalid_json", "schema", "too_many_hypotheses", "too_deep",
                       "source_mismatch", "internal_error")
PUBLISH_KINDS = ("output", "prompt", "dead_letter")
CONNECT_FAILURES = ("network", "tls", "refused")
# How late the event loop runs a timer: 1 ms and below is healthy, 100 ms means a message's whole
# budget is gone before the relay even looks at it.
LOOP_LAG_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
DECISIONS = ("accept", "confirm", "reprompt", "none")


class Metrics:
    """The relay's metrics on ``registry`` (a fresh CollectorRegistry in tests)."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        self.messages = Counter(
            "rehear_messages_total", "Input messages handled, by outcome.", ["outcome"], registry=registry
        )
        self.latency = Histogram(
            "rehear_latency_seconds",
            "From receipt of an input message until its result was accepted by the broker.",
            buckets=LATENCY_BUCKETS, registry=registry,
        )
        self.processing = Histogram(
            "rehear_processing_seconds",
            "Time the relay worked on a message: parse, chain and render, without waiting and the broker.",
            buckets=LATENCY_BUCKETS, registry=registry,
        )
        self.queue_wait = Histogram(
            "rehear_queue_wait_seconds",
            "Time a message waited after receipt for its turn in the chain (behind earlier messages).",
            buckets=LATENCY_BUCKETS, registry=registry,
        )
        self.loop_lag = Histogram(
            "rehear_event_loop_lag_seconds",
            "How late the relay's event loop ran a periodic timer (the chain holding the interpreter shows here).",
            buckets=LOOP_LAG_BUCKETS, registry=registry,
        )
        self.ack_stall = Gauge(
            "rehear_ack_stall_seconds",
            "How long input has waited without any acknowledgement going out; 0 when none waits.",
            registry=registry,
        )
        self.stall_limit = Gauge(
            "rehear_stall_limit_seconds", "limits.stall_s: how long input may wait unacknowledged before /healthz "
            "turns 503.", registry=registry,
        )
        self.max_in_flight = Gauge(
            "rehear_max_in_flight", "limits.max_in_flight: the most messages held unacknowledged.", registry=registry
        )
        self.publish_refused = Counter(
            "rehear_publish_refused_total",
            "Publishes the broker refused with an MQTT 5 reason code, by what was published and the code.",
            ["kind", "code"], registry=registry,
        )
        self.connect_failures = Counter(
            "rehear_connect_failures_total", "Failed connection attempts, by cause.", ["reason"], registry=registry
        )
        self.stage_latency = Histogram(
            "rehear_stage_latency_seconds", "Time spent in each stage per message.", ["stage"],
            buckets=LATENCY_BUCKETS, registry=registry,
        )
        self.corrections = Counter(
            "rehear_corrections_total", "Corrections applied, by the stage that made them.", ["stage"],
            registry=registry,
        )
        self.decisions = Counter(
            "rehear_decisions_total", "Gate decisions on cleaned messages ('none' when no gate ran).",
            ["decision"], registry=registry,
        )
        self.dead_letters = Counter(
            "rehear_dead_letters_total", "Input sent to the dead-letter topic, by reason.", ["reason"],
            registry=registry,
        )
        self.stage_errors = Counter(
            "rehear_stage_errors_total", "Exceptions raised by a stage while processing a message.", ["stage"],
            registry=registry,
        )
        self.broker_connected = Gauge(
            "rehear_broker_connected", "1 while the broker connection is up, else 0.", registry=registry
        )
        self.in_flight = Gauge(
            "rehear_in_flight_messages", "Messages received and not yet acknowledged.", registry=registry
        )
        self.reconnects = Counter(
            "rehear_reconnects_total", "Connection attempts after the first one.", registry=registry
        )
        self.reloads = Counter(
            "rehear_reloads_total", "Configuration reloads, by result.", ["result"], registry=registry
        )
        self.capture_records = Counter(
            "rehear_capture_records_total", "Records written by capture (an input with what was published for it).",
            registry=registry,
        )
        self.capture_dropped = Counter(
            "rehear_capture_dropped_total",
            "Capture records dropped: the writer's queue was full or the disk refused them.", registry=registry,
        )
        self.chain_loaded = Gauge(
            "rehear_chain_loaded", "1 once a stage chain is loaded and serving.", registry=registry
        )
        # Pre-create the closed label sets so every series exists (at 0) from the start:
        # rate() and alerts then work without waiting for the first event.
        for outcome in OUTCOMES:
            self.messages.labels(outcome=outcome)
        for reason in DEAD_LETTER_REASONS:
            self.dead_letters.labels(reason=reason)
        for decision in DECISIONS:
            self.decisions.labels(decision=decision)
        for result in ("ok", "failed", "superseded"):
            self.reloads.labels(result=result)
        for reason in CONNECT_FAILURES:
            self.connect_failures.labels(reason=reason)

    def declare_stages(self, names: list[str]) -> None:
        """Create the per-stage series for a chain, so they exist before the first message."""
        for name in names:
            self.stage_latency.labels(stage=name)
            self.corrections.labels(stage=name)
            self.stage_errors.labels(stage=name)

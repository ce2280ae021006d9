from __future__ import annotations

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from relay.live.metrics import LATENCY_BUCKETS, Metrics


def test_metrics_live_on_the_given_registry_with_conventional_names() -> None:
    registry = CollectorRegistry()
    metrics = Metrics(registry)
    metrics.declare_stages(["normalize"])
    metrics.messages.labels(outcome="cleaned").inc()
    # Parsed with prometheus_client's own reader of the text format (prometheus/client_python).
    families = {f.name: f for f in text_string_to_metric_families(generate_latest(registry).decode())}
    assert all(name.startswith("rehear_") for name in families)
    assert families["rehear_messages"].type == "counter"
    assert families["rehear_latency_seconds"].type == "histogram"
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value for s in families["rehear_messages"].samples}
    assert samples[("rehear_messages_total", (("outcome", "cleaned"),))] == 1
    assert samples[("rehear_messages_total", (("outcome", "dead_letter"),))] == 0
    buckets = [s.labels["le"] for s in families["rehear_stage_latency_seconds"].samples if s.name.endswith("_bucket")]
    assert buckets[0] == "0.0001" and buckets[-2] == "1.0" and len(buckets) == len(LATENCY_BUCKETS) + 1


def test_two_instances_do_not_share_state() -> None:
    first, second = Metrics(CollectorRegistry()), Metrics(CollectorRegistry())
    first.reconnects.inc()
    assert second.reconnects._value.get() == 0

"""The Prometheus rules: valid, and firing when the relay is down or stalled (promtool's own unit
tests, deploy/prometheus/rules_test.yaml); every metric they read is one the relay exports."""

from __future__ import annotations

import re
import subprocess

import yaml
from prometheus_client import CollectorRegistry

from relay.live.metrics import Metrics
from tests.conftest import program
from tests.paths import ROOT

RULES = ROOT / "deploy/prometheus"


def test_the_rules_are_valid_and_fire_when_the_relay_is_down_or_stalled() -> None:
    promtool = program("promtool", "prometheus")
    checked = subprocess.run([promtool, "check", "rules", "alerts.yaml"], cwd=RULES, capture_output=True, text=True,
                             timeout=60)
    assert checked.returncode == 0, checked.stdout + checked.stderr
    tested = subprocess.run([promtool, "test", "rules", "rules_test.yaml"], cwd=RULES, capture_output=True, text=True,
                            timeout=60)
    assert tested.returncode == 0, tested.stdout + tested.stderr


def _served() -> dict[str, str]:
    """The relay's metric names as /metrics shows them (counters with _total), with their types."""
    families = Metrics(CollectorRegistry()).registry.collect()
    return {(f.name + "_total" if f.type == "counter" else f.name): f.type for f in families}


def test_every_metric_the_rules_read_is_exported() -> None:
    names = set()
    for name, kind in _served().items():
        names.add(name)
        if kind == "histogram":
            names |= {f"{name}_bucket", f"{name}_sum", f"{name}_count"}
    rules = yaml.safe_load((RULES / "alerts.yaml").read_text())
    used = {name for group in rules["groups"] for rule in group["rules"]
            for name in re.findall(r"\b(rehear_\w+)", rule["expr"])}
    assert used and used <= names, sorted(used - names)


def _readme_rows() -> dict[str, tuple[set[str], str]]:
    """metric -> (labels, meaning) from the README's metrics table."""
    readme = (ROOT / "README.md").read_text()
    table = readme[readme.index("| metric | labels | meaning |"):]
    table = table[:table.index("\n\n")]
    rows = {}
    for line in table.splitlines()[2:]:
        names, labels, meaning = (cell.strip() for cell in line.strip("|").split("|"))
        for name in re.findall(r"`(rehear_\w+)`", names):
            rows[name] = (set(re.findall(r"`(\w+)`", labels)), meaning)
    return rows


def test_the_readme_metrics_table_is_what_the_relay_serves() -> None:
    rows = _readme_rows()
    served = set(_served())
    assert set(rows) == served, (sorted(served - set(rows)), sorted(rows.keys() - served))


def test_the_readme_names_each_metrics_labels_and_every_value_of_a_closed_label() -> None:
    metrics = Metrics(CollectorRegistry())
    rows = _readme_rows()
    for family in metrics.registry.collect():
        name = family.name + "_total" if family.type == "counter" else family.name
        wrapper = next(m for m in vars(metrics).values() if getattr(m, "_name", None) == family.name)
        labels = set(wrapper._labelnames)
        assert rows[name][0] == labels, (name, rows[name][0], labels)
        # Label values the relay creates up front are a closed set: each is documented. Stage
        # names and reason codes come from the configuration and the broker, so none exist yet.
        values = {value for sample in family.samples for key, value in sample.labels.items() if key in labels}
        missing = {value for value in values if not re.search(rf"\b{re.escape(value)}\b", rows[name][1])}
        assert not missing, (name, sorted(missing))

from __future__ import annotations

import re
from itertools import pairwise

import pytest

from relay.workbench.evaluate import Outcome, summarize
from relay.workbench.report import (
    ReportHeader,
    by_tag,
    entity_type,
    reliability,
    render_report,
    tradeoff_curve,
)
from stages.gate.confidence import ConfidenceModel, FeatureWeight
from stages.gate.features import GateFeatures


def _outcome(posterior: float, right: bool, oov: int | None = None) -> Outcome:
    features = GateFeatures(posterior=posterior, margin=posterior, weakest_entity=0.9, corrected=False,
                            correction_score=None, lm_per_word=None, safety_rule=None, empty=False, text_oov=oov)
    return Outcome(id="x", tags={}, ref_words=3, errors_first=0, errors_oracle=0, errors_relay=0,
                   reference_ids=frozenset({"a"}), found={"a": "machine"} if right else {}, decision="accept",
                   gate=features, stage_us={}, total_us=0.0)


def test_tradeoff_curve_trades_clarifications_for_fewer_wrong_accepts() -> None:
    # Confident results are right, unsure ones wrong: asking back the unsure half removes every wrong accept.
    outcomes = [_outcome(0.95, True)] * 5 + [_outcome(0.25, False)] * 5
    curve = tradeoff_curve(outcomes)
    assert curve[0] == (0.0, 0.5)
    assert (0.5, 0.0) in curve
    assert all(a[0] <= b[0] and a[1] > b[1] for a, b in pairwise(curve))
    assert all(clarify < 1.0 for clarify, _ in curve)  # refusing everything is no operating point


def test_with_a_learned_confidence_the_curve_follows_its_threshold_too() -> None:
    # The posterior says nothing here; unknown words in the text do, and only the model reads them.
    outcomes = [_outcome(0.8, True, oov=0)] * 6 + [_outcome(0.8, False, oov=2)] * 4
    model = ConfidenceModel(features={"text_oov": FeatureWeight(weight=-2.0)})
    assert min(w for _, w in tradeoff_curve(outcomes)) == 0.4
    curve = tradeoff_curve(outcomes, model)
    assert (0.4, 0.0) in curve


def test_entity_type_falls_back_to_the_id_prefix() -> None:
    assert entity_type("machine.lathe", {}) == "machine"
    assert entity_type("machine.lathe", {"machine.lathe": "tool"}) == "tool"
    assert entity_type("lathe", {}) == "unknown"


def test_by_tag_splits_the_summary_by_each_condition_and_skips_id_like_tags() -> None:
    outcomes = []
    for i, (snr, right) in enumerate([(None, True)] * 3 + [(15, False)] * 2):
        outcome = _outcome(0.9, right)
        outcome.tags = {"snr_db": snr, "recording": f"r{i}"}
        outcomes.append(outcome)
    rows = by_tag(outcomes)
    assert [(tag, value, s.utterances) for tag, value, s in rows] == [("snr_db", "15", 2), ("snr_db", "null", 3)]
    assert rows[0][2].wrong_accept_rate == 1.0 and rows[1][2].wrong_accept_rate == 0.0


def _listed(ident: str, *, decision: str, right: bool, confidence: float | None, rule: str | None) -> Outcome:
    outcome = _outcome(0.5, right)
    outcome.id, outcome.decision, outcome.confidence, outcome.rule = ident, decision, confidence, rule  # type: ignore[assignment]
    outcome.reference, outcome.first, outcome.text = "book the lathe", "book the late", "book the lathe"
    outcome.nbest = [("book the lathe", 0.7), ("book the late", 0.3)]
    return outcome


def test_the_report_says_what_was_run_in_percent_with_null_and_lists_the_results_to_read() -> None:
    outcomes = [_listed("ws-0001-a-long-identifier", decision="accept", right=False, confidence=0.9, rule="scores"),
                _listed("ws-0002", decision="confirm", right=True, confidence=None, rule=None),
                _listed("ws-0003", decision="accept", right=True, confidence=0.8, rule="scores")]
    about = ReportHeader(configuration="examples/workshop/relay.yaml", config_hash="abc123",
                         corpus="examples/workshop/corpus-whisper.jsonl", selection="snr_db!=15",
                         chain=("normalize", "gate"), version="9.9.9", created="2026-12-02 10:00 UTC")
    page = render_report(outcomes, summarize(outcomes), about=about)
    for expected in ("<th>configuration</th><td>examples/workshop/relay.yaml (hash abc123)</td>",
                     "<th>chain</th><td>normalize -&gt; gate</td>", "<th>rehear</th><td>9.9.9</td>",
                     "<th>date</th><td>2026-12-02 10:00 UTC</td>",
                     "corpus-whisper.jsonl: 3 utterances (snr_db!=15)"):
        assert expected in page, expected
    assert "None" not in page and "<span class='null'>null</span>" in page  # the missing rule
    # shares in percent, the split of what was asked back, latency in one unit
    assert "<th>wrong accepts, % of accepted (entity ids differ)</th><td class='num'>50.0% (1 of 2)</td>" in page
    assert "by the safety rule (policy)" in page and "from the gate's doubt" in page
    assert "0.9" not in re.sub(r"data:image/png;base64,[^']+", "", page).replace("9.9.9", "")  # no raw fractions
    # the lists: each wrong accept and each right result asked back, with the N-best
    assert "<h2>Wrong accepts (1)</h2>" in page and "<h2>Asked back, but right (1)</h2>" in page
    assert "<td class='id'>ws-0001-a-long-identifier</td>" in page and ".id,.nowrap{white-space:nowrap}" in page
    assert "<li>book the late <span class='null'>(30%)</span></li>" in page
    assert "img{display:block;width:100%" in page


def test_the_reliability_bins_put_each_confidence_with_how_often_it_was_right() -> None:
    outcomes = [_outcome(0.5, True) for _ in range(4)] + [_outcome(0.5, False) for _ in range(4)]
    for outcome, confidence in zip(outcomes, [0.95, 0.92, 0.15, 0.12, 0.97, 0.18, 0.11, 0.14]):
        outcome.confidence = confidence
    assert reliability(outcomes) == [(0.1, pytest.approx(0.14), 0.4, 5), (0.9, pytest.approx(0.9466666), 2 / 3, 3)]

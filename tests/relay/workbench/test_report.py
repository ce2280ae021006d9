from __future__ import annotations

from itertools import pairwise

from relay.workbench.evaluate import Outcome
from relay.workbench.report import by_tag, entity_type, tradeoff_curve
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

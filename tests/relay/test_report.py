from __future__ import annotations

from itertools import pairwise

from relay.evaluate import Outcome
from relay.report import entity_type, tradeoff_curve
from stages.gate import GateFeatures


def _outcome(posterior: float, right: bool) -> Outcome:
    features = GateFeatures(posterior=posterior, margin=posterior, weakest_entity=0.9, corrected=False,
                            correction_score=None, lm_per_word=None, safety_rule=None, empty=False)
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


def test_entity_type_falls_back_to_the_id_prefix() -> None:
    assert entity_type("machine.lathe", {}) == "machine"
    assert entity_type("machine.lathe", {"machine.lathe": "tool"}) == "tool"
    assert entity_type("lathe", {}) == "unknown"

"""Advice the workbench prints beside its numbers: `rehear eval` when the recogniser gives no
confidence at all, `rehear tune` when its held-out wrong accepts stay high."""

from __future__ import annotations

from types import SimpleNamespace

from relay.cli.eval import conf_note
from relay.cli.tune import WARN_WRONG_ACCEPTS, wrong_accepts_warning
from stages.gate.confidence import ConfidenceModel, FeatureWeight
from stages.gate.features import GateFeatures

READS_ABSENCE = ConfidenceModel(features={"asr_no_conf": FeatureWeight(weight=-0.5, center=0.2, scale=0.4)})
IGNORES_IT = ConfidenceModel(features={"posterior": FeatureWeight(weight=1.0)})


def outcome(no_conf: int | None) -> SimpleNamespace:
    features = GateFeatures(posterior=0.9, margin=0.8, weakest_entity=None, corrected=False, correction_score=None,
                            lm_per_word=None, safety_rule=None, empty=False, asr_no_conf=no_conf)
    return SimpleNamespace(gate=features)


def test_a_corpus_without_any_conf_gets_advice_naming_the_setting_and_the_corpus() -> None:
    note = conf_note([outcome(1), outcome(1)], READS_ABSENCE, "logs/monday.jsonl")
    assert note is not None
    assert "logs/monday.jsonl" in note and "asr_gives_conf: false" in note


def test_no_advice_when_some_message_gives_one_or_nothing_reads_its_absence() -> None:
    assert conf_note([outcome(1), outcome(0)], READS_ABSENCE, "c.jsonl") is None
    assert conf_note([outcome(1)], IGNORES_IT, "c.jsonl") is None
    assert conf_note([outcome(None)], READS_ABSENCE, "c.jsonl") is None  # already told: asr_gives_conf false
    assert conf_note([outcome(1)], None, "c.jsonl") is None


def held_out(wrong: int, accepted: int) -> SimpleNamespace:
    return SimpleNamespace(wrong_accepts=wrong, accepted=accepted, wrong_accept_rate=wrong / accepted if accepted else 0.0)


def test_tune_warns_when_held_out_wrong_accepts_stay_over_the_share_and_says_what_to_do() -> None:
    # 38 of 90 accepted wrong: the boatyard's pocketsphinx corpus tuned at a 30% budget came out so.
    warning = wrong_accepts_warning(held_out(38, 90), 0.3)
    assert warning is not None
    assert "42.2%" in warning and "38 of 90" in warning and "--max-clarify" in warning and "30%" in warning


def test_tune_says_nothing_at_or_under_the_share_or_with_nothing_accepted() -> None:
    at = round(WARN_WRONG_ACCEPTS * 200)
    assert wrong_accepts_warning(held_out(at, 200), 0.3) is None
    assert wrong_accepts_warning(held_out(at + 1, 200), 0.3) is not None
    assert wrong_accepts_warning(held_out(0, 0), 0.3) is None

"""Advice the workbench prints beside its numbers: `rehear eval` when the recogniser gives no
confidence at all."""

from __future__ import annotations

from types import SimpleNamespace

from relay.cli.eval import conf_note
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


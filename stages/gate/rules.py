"""The gate's decision rule: one implementation for one utterance (the live gate) and for a
whole grid of thresholds over many recorded utterances at once (`tune`).

The hand thresholds are a list of conditions in order of severity; the first that holds
decides. Each condition is written with operators that work the same on Python floats and on
numpy arrays, so ``threshold_rules`` evaluated on one utterance's features gives the live
decision, and evaluated on arrays (utterances along one axis, candidate thresholds along the
other) gives where each candidate would accept: that is where no condition holds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from relay.core.utterance import Decision
from stages.gate.confidence import confidence
from stages.gate.features import GateFeatures
from stages.gate.settings import GateSettings

__all__ = ["SEVERITY", "FeatureView", "Thresholds", "decide", "threshold_rules"]

SEVERITY: dict[Decision, int] = {"accept": 0, "confirm": 1, "reprompt": 2}


@dataclass(frozen=True, slots=True)
class FeatureView:
    """The features the thresholds read, as floats or as arrays; a missing score is +inf so that
    "below the threshold" never holds for it."""

    empty: Any
    posterior: Any
    margin: Any
    weakest: Any  # weakest entity score; inf without entities
    has_entity: Any
    correction: Any  # weakest correction score; inf without corrections
    lm: Any  # in-domain LM per word of the top hypothesis; inf when unknown

    @classmethod
    def of(cls, f: GateFeatures) -> FeatureView:
        return cls(
            empty=f.empty, posterior=f.posterior, margin=f.margin,
            weakest=math.inf if f.weakest_entity is None else f.weakest_entity,
            has_entity=f.weakest_entity is not None,
            correction=(f.correction_score or 0.0) if f.corrected else math.inf,
            lm=math.inf if f.lm_per_word is None else f.lm_per_word,
        )


@dataclass(frozen=True, slots=True)
class Thresholds:
    """The hand thresholds, as floats or as column arrays of candidates."""

    accept_posterior: Any
    accept_margin: Any
    accept_entity: Any
    accept_correction: Any
    accept_without_entity: Any
    reprompt_posterior: Any = 0.0
    reprompt_entity: Any = 0.0
    min_lm_per_word: float | None = None

    @classmethod
    def of(cls, s: GateSettings) -> Thresholds:
        return cls(s.accept_posterior, s.accept_margin, s.accept_entity, s.accept_correction,
                   s.accept_without_entity, s.reprompt_posterior, s.reprompt_entity, s.min_lm_per_word)


def threshold_rules(f: FeatureView, t: Thresholds) -> list[tuple[Decision, str, Any]]:
    """(decision, rule, condition) in order of severity; ``&`` and ``<`` so arrays work too."""
    rules: list[tuple[Decision, str, Any]] = [
        ("reprompt", "empty", f.empty),
        ("reprompt", "low_posterior", f.posterior < t.reprompt_posterior),
        ("reprompt", "weak_entity", f.weakest < t.reprompt_entity),
        ("confirm", "posterior", f.posterior < t.accept_posterior),
        ("confirm", "margin", f.margin < t.accept_margin),
        ("confirm", "entity", f.weakest < t.accept_entity),
        ("confirm", "no_entity", (f.has_entity < 0.5) & (t.accept_without_entity < 0.5)),  # both false
        ("confirm", "correction", f.correction < t.accept_correction),
    ]
    if t.min_lm_per_word is not None:
        rules.append(("confirm", "lm_per_word", f.lm < t.min_lm_per_word))
    return rules


def _by_thresholds(features: GateFeatures, settings: GateSettings) -> tuple[Decision, str]:
    for decision, rule, holds in threshold_rules(FeatureView.of(features), Thresholds.of(settings)):
        if holds:
            return decision, rule
    return "accept", "scores"


def decide(features: GateFeatures, settings: GateSettings, *, sure: float | None = None) -> tuple[Decision, str]:
    """The decision and the rule that produced it, from features and settings alone (``sure``:
    the model's confidence when the caller has computed it already)."""
    decision, rule = _by_thresholds(features, settings)
    model = settings.model()
    if model is not None and not features.empty:
        if sure is None:
            sure = confidence(features.values(), model)
        if sure < settings.reprompt_confidence and SEVERITY[decision] < SEVERITY["reprompt"]:
            decision, rule = "reprompt", "low_confidence"
        elif sure < settings.accept_confidence and SEVERITY[decision] < SEVERITY["confirm"]:
            decision, rule = "confirm", "confidence"
    # The safety rule only ever makes the answer more cautious: asking again stays asking again.
    if features.safety_rule is not None and SEVERITY[decision] < SEVERITY["confirm"]:
        return "confirm", "safety:" + features.safety_rule
    # A doubt with no entity to ask about would read the whole sentence back ("did you mean
    # somebody spilled know over to?"), which nobody can answer: ask again instead.
    if decision == "confirm" and features.entities == 0 and features.weakest_entity is None:
        return "reprompt", rule
    return decision, rule

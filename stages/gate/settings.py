"""The gate's settings: its thresholds, the learned confidence, the safety rule's lists and the prompts."""

from __future__ import annotations

import json
import re
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from stages.gate.confidence import ConfidenceModel

__all__ = ["DEFAULT_SAFETY_TYPES", "DEFAULT_SAFETY_WORDS", "GateSettings", "PromptTemplates", "default_confidence"]

_PLACEHOLDERS = frozenset({"text", "entity", "heard", "type_noun"})
_FIELD = re.compile(r"\{([^{}]*)\}")

# Verbs that set something in motion, release energy or material. A false alarm costs one
# "did you mean ...?"; a miss can hurt someone, so the list errs on the side of asking.
DEFAULT_SAFETY_WORDS = [
    "start", "restart", "run", "open", "dose", "lift", "raise", "lower", "spin up", "power up",
    "switch on", "turn on", "fire up", "ignite", "energise", "energize", "engage", "activate",
    "release", "unlock", "feed", "pump", "inject", "pressurise", "pressurize", "heat up", "drain",
]
DEFAULT_SAFETY_TYPES = ["valve", "actuator", "hoist", "chemical", "dosing", "conveyor"]


def _check_template(template: str) -> str:
    for name in _FIELD.findall(template):
        if name not in _PLACEHOLDERS:
            allowed = ", ".join("{" + p + "}" for p in sorted(_PLACEHOLDERS))
            raise ValueError(f"unknown placeholder {{{name}}} (allowed: {allowed})")
    return template


class PromptTemplates(BaseModel):
    """What to say back. ``{entity}`` is the entity the question is about, ``{heard}`` what
    the recogniser produced for it, ``{type_noun}`` its type as a noun, ``{text}`` the result."""

    model_config = ConfigDict(extra="forbid")

    confirm: str = "Did you mean {text}?"
    confirm_entity: str = "Did you mean {entity}?"
    confirm_safety: str = "Please confirm: {text}?"
    reprompt: str = "Sorry, could you say that again?"
    reprompt_entity: str = "Which {type_noun}?"

    _templates = field_validator("*")(_check_template)


@lru_cache(maxsize=1)
def default_confidence() -> ConfidenceModel:
    """The confidence shipped with rehear (data/default_confidence.json, scripts/fit_default_gate.py)."""
    path = resources.files("stages.gate") / "data" / "default_confidence.json"
    return ConfidenceModel.model_validate(json.loads(path.read_text(encoding="utf-8"))["model"])


class GateSettings(BaseModel):
    """The hand thresholds are open by default: the learned confidence (the shipped default model
    unless `rehear tune` wrote one) weighs the same scores and more, and decides."""

    model_config = ConfigDict(extra="forbid")

    accept_posterior: float = Field(0.0, ge=0, le=1, description="top posterior needed to accept")
    accept_margin: float = Field(0.0, ge=0, le=1, description="lead over the runner-up needed to accept")
    accept_entity: float = Field(0.0, ge=0, le=1, description="weakest entity score needed to accept")
    accept_correction: float = Field(
        0.0, ge=0, le=1.01, description="a correction scored below this is confirmed (above 1: always)"
    )
    accept_without_entity: bool = Field(
        True, description="accept a result in which no lexicon entity was found (most commands name one)"
    )
    min_lm_per_word: float | None = Field(
        None, description="LM natural-log score per word below which the result is confirmed; off when unset"
    )
    reprompt_posterior: float = Field(0.0, ge=0, le=1, description="top posterior below which to ask again")
    reprompt_entity: float = Field(0.0, ge=0, le=1, description="weakest entity score below which to ask again")
    lm_model: Path | None = Field(
        None, description="in-domain ARPA/kenlm model that judges the finished text (features for `confidence`); "
        "default: domain.language_model"
    )
    carrier_text: Path | None = Field(
        None, description="in-domain text with {type} slots (FORMATS 4): a template whose slot holds everyday "
        "words marks an entity that was missed (feature unfilled_slots for `confidence`; 'Which ...?' prompts); "
        "a result far from every line is one the NLU was not trained on (feature line_edits); default: domain.text",
    )
    carrier_lexicon: Path | None = Field(
        None, description="lexicon whose names and aliases in carrier_text's literal lines count as slots; "
        "default: domain.lexicon",
    )
    asr_gives_conf: bool = Field(
        True, description="the recogniser gives a `conf` (FORMATS 1) on some hypothesis of most messages, so a "
        "message without one is read as doubt (feature asr_no_conf); set false for a recogniser that never does"
    )
    confidence: ConfidenceModel | Literal["default"] | None = Field(
        "default", description="learned confidence that the entities are right: `default` (shipped with rehear, "
        "fitted on two invented trades and two recognisers), a model written by `rehear tune`, or null (off)"
    )
    # 0.8: the default model fitted on one example scenario and applied to the other kept wrong
    # accepts at 4-6% with 30-37% asked back from doubt (benchmarks/gate_transfer.py).
    accept_confidence: float = Field(0.8, ge=0, le=1.01, description="confidence needed to accept")
    reprompt_confidence: float = Field(0.3, ge=0, le=1, description="confidence below which to ask again")
    safety_words: list[str] = Field(default_factory=lambda: list(DEFAULT_SAFETY_WORDS))
    safety_types: list[str] = Field(default_factory=lambda: list(DEFAULT_SAFETY_TYPES))
    safety_min_posterior: float = Field(
        0.1, ge=0, le=1.01,
        description="other hypotheses at least this likely are checked for safety words too (above 1: off)",
    )
    prompts: PromptTemplates = Field(default_factory=PromptTemplates)
    prompts_by_type: dict[str, PromptTemplates] = Field(
        default_factory=dict, description="per entity type, replaces the prompts above"
    )
    type_nouns: dict[str, str] = Field(default_factory=dict, description="entity type -> noun used in prompts")

    def model(self) -> ConfidenceModel | None:
        """The confidence model in use: the shipped default, the configured one, or none."""
        return default_confidence() if self.confidence == "default" else self.confidence

    @model_validator(mode="after")
    def _ordered(self) -> GateSettings:
        if self.reprompt_posterior > self.accept_posterior:
            raise ValueError("reprompt_posterior must not exceed accept_posterior")
        if self.reprompt_entity > self.accept_entity:
            raise ValueError("reprompt_entity must not exceed accept_entity")
        if self.reprompt_confidence > self.accept_confidence:
            raise ValueError("reprompt_confidence must not exceed accept_confidence")
        return self

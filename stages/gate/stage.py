"""Stage `gate`: accept the result, confirm it ("did you mean ...?") or ask again ("which machine?").

The decision is a pure function of a few recorded features (``GateFeatures``) and the
settings, so `tune` can sweep thresholds on features recorded once instead of re-running
the chain. Two kinds of rule read the features: thresholds on single scores, and an optional
learned confidence (``stages.gate_confidence``: a logistic model that `tune` fits, which also
sees how the in-domain language model judges the finished text). The more cautious answer of
the two wins. A safety rule sits on top of the scores: a command that can move machinery, open
a valve or dose a chemical is never accepted on voice alone.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, ClassVar

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from relay.core.errors import ConfigError
from relay.core.stage import StageContext
from relay.core.utterance import Decision, Utterance
from stages.gate.confidence import ConfidenceModel, confidence
from stages.indomain.carriers import CarrierPhrases, replace_runs, runs_by_first_word
from stages.indomain.nearest_line import NearestLine
from stages.lm.model import score_tokens, shared_model
from stages.normalize.tokens import tokenize

__all__ = ["GateFeatures", "GateSettings", "GateStage", "decide"]

_PLACEHOLDERS = frozenset({"text", "entity", "heard", "type_noun"})
_FIELD = re.compile(r"\{([^{}]*)\}")
_SEVERITY: dict[Decision, int] = {"accept": 0, "confirm": 1, "reprompt": 2}
# The recogniser's confidence enters as a natural log, floored here: a sentence posterior that
# underflowed to 0 must not become -inf (pocketsphinx's reach about -30 on noisy workshop audio).
ASR_LOG_FLOOR = -40.0

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


class GateSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")

    accept_posterior: float = Field(0.6, ge=0, le=1, description="top posterior needed to accept")
    accept_margin: float = Field(0.2, ge=0, le=1, description="lead over the runner-up needed to accept")
    accept_entity: float = Field(0.5, ge=0, le=1, description="weakest entity score needed to accept")
    accept_correction: float = Field(
        0.8, ge=0, le=1.01, description="a correction scored below this is confirmed (above 1: always)"
    )
    accept_without_entity: bool = Field(
        True, description="accept a result in which no lexicon entity was found (most commands name one)"
    )
    min_lm_per_word: float | None = Field(
        None, description="LM natural-log score per word below which the result is confirmed; off when unset"
    )
    reprompt_posterior: float = Field(0.2, ge=0, le=1, description="top posterior below which to ask again")
    reprompt_entity: float = Field(0.2, ge=0, le=1, description="weakest entity score below which to ask again")
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
    confidence: ConfidenceModel | None = Field(
        None, description="learned confidence that the entities are right (written by `rehear tune`); off when unset"
    )
    accept_confidence: float = Field(0.5, ge=0, le=1.01, description="confidence needed to accept")
    reprompt_confidence: float = Field(0.15, ge=0, le=1, description="confidence below which to ask again")
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

    @model_validator(mode="after")
    def _ordered(self) -> GateSettings:
        if self.reprompt_posterior > self.accept_posterior:
            raise ValueError("reprompt_posterior must not exceed accept_posterior")
        if self.reprompt_entity > self.accept_entity:
            raise ValueError("reprompt_entity must not exceed accept_entity")
        if self.reprompt_confidence > self.accept_confidence:
            raise ValueError("reprompt_confidence must not exceed accept_confidence")
        return self


@dataclass(frozen=True, slots=True)
class GateFeatures:
    """What the gate looks at, recorded once per utterance."""

    posterior: float
    margin: float
    weakest_entity: float | None
    corrected: bool
    correction_score: float | None  # the weakest correction's score
    lm_per_word: float | None
    safety_rule: str | None  # e.g. "word:start" or "type:valve"
    empty: bool
    entities: int = 0
    corrections: int = 0
    words: int = 0
    text_lm_per_word: float | None = None  # natural log per word, </s> included, of the finished text
    text_lm_weakest: float | None = None  # natural log of its least likely word
    text_oov: int | None = None
    unfilled_slots: int | None = None  # 1 when a carrier phrase has a slot no entity fills; None: no carrier_text
    unfilled_type: str | None = None  # that slot's entity type
    line_edits: int | None = None  # word edits to the nearest in-domain line; None: no carrier_text
    asr_log_conf: float | None = None  # ln of the highest `conf` the recogniser gave; None: it gave none

    def values(self) -> dict[str, float | None]:
        """The numeric features by name, as ``stages.gate_confidence`` reads them."""
        return {
            "posterior": self.posterior,
            "margin": self.margin,
            "weakest_entity": 1.0 if self.weakest_entity is None else self.weakest_entity,
            "entities": float(self.entities),
            "corrections": float(self.corrections),
            "words": float(self.words),
            "lm_per_word": self.lm_per_word,
            "text_lm_per_word": self.text_lm_per_word,
            "text_lm_weakest": self.text_lm_weakest,
            "text_oov": None if self.text_oov is None else float(self.text_oov),
            "unfilled_slots": None if self.unfilled_slots is None else float(self.unfilled_slots),
            "line_edits": None if self.line_edits is None else float(self.line_edits),
            "asr_log_conf": self.asr_log_conf,
        }


def decide(features: GateFeatures, settings: GateSettings) -> tuple[Decision, str]:
    """The decision and the rule that produced it, from features and settings alone."""
    decision, rule = _by_thresholds(features, settings)
    if settings.confidence is not None and not features.empty:
        sure = confidence(features.values(), settings.confidence)
        if sure < settings.reprompt_confidence and _SEVERITY[decision] < _SEVERITY["reprompt"]:
            decision, rule = "reprompt", "low_confidence"
        elif sure < settings.accept_confidence and _SEVERITY[decision] < _SEVERITY["confirm"]:
            decision, rule = "confirm", "confidence"
    # The safety rule only ever makes the answer more cautious: asking again stays asking again.
    if features.safety_rule is not None and _SEVERITY[decision] < _SEVERITY["confirm"]:
        return "confirm", "safety:" + features.safety_rule
    return decision, rule


def _by_thresholds(features: GateFeatures, settings: GateSettings) -> tuple[Decision, str]:
    decision: Decision
    if features.empty:
        decision, rule = "reprompt", "empty"
    elif features.posterior < settings.reprompt_posterior:
        decision, rule = "reprompt", "low_posterior"
    elif features.weakest_entity is not None and features.weakest_entity < settings.reprompt_entity:
        decision, rule = "reprompt", "weak_entity"
    elif features.posterior < settings.accept_posterior:
        decision, rule = "confirm", "posterior"
    elif features.margin < settings.accept_margin:
        decision, rule = "confirm", "margin"
    elif features.weakest_entity is not None and features.weakest_entity < settings.accept_entity:
        decision, rule = "confirm", "entity"
    elif features.weakest_entity is None and not settings.accept_without_entity:
        decision, rule = "confirm", "no_entity"
    elif features.corrected and (features.correction_score or 0.0) < settings.accept_correction:
        decision, rule = "confirm", "correction"
    elif (settings.min_lm_per_word is not None and features.lm_per_word is not None
          and features.lm_per_word < settings.min_lm_per_word):
        decision, rule = "confirm", "lm_per_word"
    else:
        decision, rule = "accept", "scores"
    return decision, rule


def _recogniser_confidence(utterance: Utterance) -> float | None:
    """Natural log of the highest ``conf`` (FORMATS section 1) the recogniser gave any hypothesis,
    read from the message as received; None when it gave none. A recogniser that scores only its
    best path (pocketsphinx: the lattice posterior of the best path) puts it on that entry."""
    entries = utterance.payload.get("nbest") or []  # as received: merging duplicates drops entries
    given = [float(c) for h in entries if isinstance(h, dict) and isinstance(c := h.get("conf"), (int, float))]
    if not given:
        return None
    top = max(given)
    return max(math.log(top), ASR_LOG_FLOOR) if top > 0 else ASR_LOG_FLOOR


def _marked(utterance: Utterance) -> list[str]:
    """The result's tokens with each entity's span replaced by its ``{type}`` marker."""
    return CarrierPhrases.marked(utterance.text, [(e.span[0], e.span[1], e.type) for e in utterance.entities])


def _judged(model: Any, words: list[str]) -> dict[str, Any]:
    """How the LM sees the finished text: natural log per word (``</s>`` counted), its least
    likely word, and the words it has never seen."""
    score = score_tokens(model, words)
    return {"text_lm_per_word": score.per_word, "text_lm_weakest": score.weakest, "text_oov": score.oov}


class GateStage:
    """Decide what happens to the result and what to say back when it is not accepted."""

    name: ClassVar[str] = "gate"
    Settings: ClassVar[type[BaseModel]] = GateSettings
    needs: ClassVar[frozenset[str]] = frozenset({"posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"decision"})

    def __init__(self, settings: GateSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.context = context
        self.lm_path = context.domain_file("language_model", settings.lm_model)
        self.text_path = context.domain_file("text", settings.carrier_text)
        self.lexicon_path = context.domain_file("lexicon", settings.carrier_lexicon) if self.text_path else None
        self.uses = {"language model": self.lm_path, "carrier phrases": self.text_path,
                     "carrier lexicon": self.lexicon_path}
        used = set(settings.confidence.features) if settings.confidence else set()
        for needed, path, where in ((sorted(n for n in used if n.startswith("text_")), self.lm_path,
                                     "domain.language_model (or lm_model)"),
                                    (sorted(used & {"unfilled_slots", "line_edits"}), self.text_path,
                                     "domain.text (or carrier_text)")):
            if needed and path is None:
                raise ConfigError(f"confidence uses {', '.join(needed)}", [f"which need {where}"])
        self.lm: Any = None
        self.carriers: CarrierPhrases | None = None
        self.lines: NearestLine | None = None
        phrases = [tuple(tokenize(p)) for p in settings.safety_words]
        self._phrases = sorted({p for p in phrases if p}, key=len, reverse=True)
        # Phrases by their first word, each with its place in the longest-first order.
        self._starting: dict[str, list[tuple[int, tuple[str, ...]]]] = {}
        for order, phrase in enumerate(self._phrases):
            self._starting.setdefault(phrase[0], []).append((order, phrase))
        self._types = frozenset(settings.safety_types)

    def load(self) -> None:
        if self.lm_path is not None:
            self.lm = shared_model(self.lm_path)
        if self.text_path is not None:
            self.carriers = CarrierPhrases.from_files(self.text_path, self.lexicon_path)
            self.lines = NearestLine(tokens for _, tokens in self.carriers.lines)

    def safety_rule(self, utterance: Utterance, marked: list[str] | None = None) -> str | None:
        """Which safety rule the result trips, if any (by entity type first, then by words).

        A likely runner-up counts too: "stat the lathe" on top of "start the lathe" may
        well have been a start command, and accepting it must not be how one slips through.
        Words inside a found entity's name do not count (entity types have their own rule).
        ``marked`` is the result's tokens with the entities' spans replaced (``_marked``).
        """
        for entity in utterance.entities:
            if entity.type in self._types:
                return f"type:{entity.type}"
        # A word inside an entity's name is part of the name, not an order: "the heron lift is
        # making a noise" names a machine; "lift the pallet" still asks. In the result the
        # entities' spans are left out; in a runner-up, the same names and the words heard for them.
        names = runs_by_first_word((tuple(tokenize(form)), "") for e in utterance.entities for form in (e.name, e.heard))
        texts = [(utterance.text, tuple(marked if marked is not None else _marked(utterance)))]
        texts += [(h.text, tuple(replace_runs(tokenize(h.text), names))) for h in utterance.ranked()
                  if h.posterior >= self.settings.safety_min_posterior]
        for text, words in texts:
            found = [(order, phrase) for i, word in enumerate(words) for order, phrase in self._starting.get(word, ())
                     if words[i:i + len(phrase)] == phrase]
            if found:
                phrase = min(found)[1]  # the longest phrase, as listed, when several occur
                return "word:" + " ".join(phrase) + ("" if text == utterance.text else " (runner-up)")
        return None

    def features(self, utterance: Utterance) -> GateFeatures:
        ranked = utterance.ranked()
        top = ranked[0].posterior if ranked else 0.0
        runner_up = ranked[1].posterior if len(ranked) > 1 else 0.0
        entity_scores = [e.score for e in utterance.entities]
        correction_scores = [c.score for c in utterance.corrections]
        lm = ranked[0].scores.get("lm_per_word") if ranked else None
        words = tokenize(utterance.text)
        text_lm: dict[str, Any] = {}
        if self.lm is not None:
            text_lm = _judged(self.lm, words)
        marked = _marked(utterance)
        in_domain: dict[str, Any] = {}
        if self.carriers is not None:
            empty = self.carriers.unfilled(marked)
            in_domain = {"unfilled_slots": int(empty is not None), "unfilled_type": empty and empty.type}
        if self.lines is not None:
            in_domain["line_edits"] = self.lines.edits(marked)
        return GateFeatures(
            posterior=top,
            margin=top - runner_up,
            weakest_entity=min(entity_scores) if entity_scores else None,
            corrected=bool(utterance.corrections),
            correction_score=min(correction_scores) if correction_scores else None,
            lm_per_word=lm,
            safety_rule=self.safety_rule(utterance, marked),
            empty=not utterance.text.strip(),
            entities=len(utterance.entities),
            corrections=len(utterance.corrections),
            words=len(words),
            asr_log_conf=_recogniser_confidence(utterance),
            **text_lm,
            **in_domain,
        )

    def _prompt(self, utterance: Utterance, decision: Decision, rule: str, features: GateFeatures) -> str | None:
        if decision == "accept":
            return None
        about = None
        if rule in {"weak_entity", "entity"} and utterance.entities:
            about = min(utterance.entities, key=lambda e: e.score)
        elif rule in {"correction", "confidence"} and utterance.entities and utterance.corrections:
            # Unsure after a correction: the question is about what was corrected.
            corrected = {c.after for c in utterance.corrections}
            about = next((e for e in utterance.entities if e.name in corrected), None)
            about = about or min(utterance.entities, key=lambda e: e.score)
        # Asking again with a slot that only everyday words filled: ask for that slot ("Which room?").
        missing = features.unfilled_type if decision == "reprompt" and about is None else None
        kind = about.type if about is not None else missing
        prompts = self.settings.prompts
        if kind is not None and kind in self.settings.prompts_by_type:
            prompts = self.settings.prompts_by_type[kind]
        if rule.startswith("safety:"):
            template = prompts.confirm_safety
        elif decision == "confirm":
            template = prompts.confirm_entity if about is not None else prompts.confirm
        else:
            template = prompts.reprompt_entity if kind is not None else prompts.reprompt
        values: dict[str, Any] = {
            "text": utterance.text,
            "entity": about.name if about else "",
            "heard": about.heard if about else "",
            "type_noun": self.settings.type_nouns.get(kind, kind.replace("_", " ")) if kind else "",
        }
        return template.format(**values)

    def process(self, utterance: Utterance) -> Utterance:
        features = self.features(utterance)
        decision, rule = decide(features, self.settings)
        utterance.decision = decision
        utterance.prompt = self._prompt(utterance, decision, rule, features)
        utterance.note(rule=rule, decision=decision, **{k: v for k, v in asdict(features).items()})
        return utterance

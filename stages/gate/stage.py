"""Stage `gate`: accept the result, confirm it ("did you mean ...?") or ask again ("which machine?").

The decision is a pure function of a few recorded features (``GateFeatures``) and the
settings, so `tune` can sweep thresholds on features recorded once instead of re-running
the chain. Two kinds of rule read the features: thresholds on single scores, and an optional
learned confidence (``stages.gate.confidence``: a logistic model that `tune` fits, which also
sees how the in-domain language model judges the finished text). The more cautious answer of
the two wins. A safety rule sits on top of the scores: a command that can move machinery, open
a valve or dose a chemical is never accepted on voice alone.
"""

from __future__ import annotations

import logging
import math
from dataclasses import fields
from typing import Any, ClassVar

from pydantic import BaseModel

from relay.core.errors import ConfigError
from relay.core.stage import StageContext
from relay.core.utterance import Utterance
from stages.gate.confidence import ConfidenceModel, confidence, contributions
from stages.gate.features import (
    GateFeatures,
    backing,
    edit_share,
    judged_text,
    line_scores,
    marked_tokens,
    recogniser_confidence,
    recogniser_word_confidence,
)
from stages.gate.prompts import prompt_for
from stages.gate.rules import decide
from stages.gate.safety import SafetyRule
from stages.gate.settings import GateSettings
from stages.indomain.carriers import CarrierPhrases
from stages.indomain.line_stats import entity_free_share, unseen_share
from stages.indomain.nearest_line import NearestLine
from stages.lm.model import shared_model
from stages.lm.rescore import lm_per_word
from stages.normalize.tokens import tokenize

__all__ = ["GateStage", "missing_conf_advice"]

_FEATURE_NAMES = tuple(f.name for f in fields(GateFeatures))
_log = logging.getLogger("rehear.gate")
# After this many messages, none with a recogniser `conf`, a gate that reads a missing one as
# doubt says once that the recogniser may never give one (setting asr_gives_conf).
CONF_CHECK_MESSAGES = 100


def missing_conf_advice(model: ConfidenceModel | None, where: str) -> str | None:
    """What to tell a user when none of ``where`` gave a recogniser `conf`, if ``model`` reads its
    absence as doubt (every result would pay for it; the price is measured in
    relay/workbench/README.md, 'No confidence given'); None when it does not."""
    if model is None or "asr_no_conf" not in model.features:
        return None
    return (f"none of {where} gave a recogniser `conf`, and the gate's confidence reads a missing one as doubt "
            "(asr_no_conf); if the recogniser never gives one, set `asr_gives_conf: false` in the gate's settings")


# The confidence features read from the in-domain lines (carrier phrases and the nearest line).
_FROM_LINES = frozenset({"unfilled_slots", "line_edits", "line_edit_share", "line_edit_relative", "missing_slots",
                         "foreign_slots", "missing_slot_odds", "text_oov_relative"})


class GateStage:
    """Decide what happens to the result and what to say back when it is not accepted."""

    name: ClassVar[str] = "gate"
    Settings: ClassVar[type[BaseModel]] = GateSettings
    needs: ClassVar[frozenset[str]] = frozenset({"text", "message", "posterior"})
    uses: ClassVar[frozenset[str]] = frozenset({"tokens", "lm_score", "entities", "corrections"})
    provides: ClassVar[frozenset[str]] = frozenset({"decision"})

    def __init__(self, settings: GateSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.context = context
        self.lm_path = context.domain_file("language_model", settings.lm_model)
        self.text_path = context.domain_file("text", settings.carrier_text)
        self.lexicon_path = context.domain_file("lexicon", settings.carrier_lexicon) if self.text_path else None
        self.files = {"language model": self.lm_path, "carrier phrases": self.text_path,
                     "carrier lexicon": self.lexicon_path}
        # A model from the configuration must find what it reads; the shipped default counts a
        # feature it cannot have as its training mean (a chain without in-domain text still works).
        given = settings.confidence if settings.confidence != "default" else None
        used = set(given.features) if given is not None else set()
        for needed, path, where in ((sorted(n for n in used if n.startswith("text_")), self.lm_path,
                                     "domain.language_model (or lm_model)"),
                                    (sorted(used & _FROM_LINES), self.text_path,
                                     "domain.text (or carrier_text)")):
            if needed and path is None:
                raise ConfigError(f"confidence uses {', '.join(needed)}", [f"which need {where}"])
        self.lm: Any = None
        self.carriers: CarrierPhrases | None = None
        self.lines: NearestLine | None = None
        self.lines_own_share: float | None = None  # how far the in-domain lines are from one another
        self.missing_odds: float | None = None  # log-odds against an in-domain line without entities
        self.unseen: float | None = None  # Good-Turing share of new in-domain words the lines never hold
        self.line_lm: tuple[float, float] | None = None  # mean and spread of the in-domain lines' LM per word
        self._conf_checked = 0  # messages looked at for a recogniser `conf`, up to CONF_CHECK_MESSAGES
        self._conf_seen = False
        self.safety = SafetyRule(settings.safety_words, settings.safety_types,
                                 min_posterior=settings.safety_min_posterior)

    def load(self) -> None:
        if self.lm_path is not None:
            self.lm = shared_model(self.lm_path, stage=self.name)
        if self.text_path is not None:
            self.carriers = CarrierPhrases.from_files(self.text_path, self.lexicon_path)
            self.lines = NearestLine(tokens for _, tokens in self.carriers.lines)
            self.lines_own_share = self.lines.own_share()
            marked = [tokens for _, tokens in self.carriers.lines]
            free = entity_free_share(marked)
            self.missing_odds = None if free is None else math.log((1 - free) / free)
            self.unseen = unseen_share(marked)
        if self.lm is not None and self.text_path is not None:
            self.line_lm = line_scores(self.lm, self.text_path, self.lexicon_path)

    def _check_conf(self, given: bool, model: ConfidenceModel | None) -> None:
        """Warn once when the first CONF_CHECK_MESSAGES messages all lack a `conf` (missing_conf_advice)."""
        self._conf_seen = self._conf_seen or given
        self._conf_checked += 1
        if self._conf_checked == CONF_CHECK_MESSAGES and not self._conf_seen:
            advice = missing_conf_advice(model, f"the first {CONF_CHECK_MESSAGES} messages")
            if advice is not None:
                _log.warning(advice)

    def features(self, utterance: Utterance) -> GateFeatures:
        ranked = utterance.ranked()
        top = ranked[0].posterior if ranked else 0.0
        runner_up = ranked[1].posterior if len(ranked) > 1 else 0.0
        entity_scores = [e.score for e in utterance.entities]
        correction_scores = [c.score for c in utterance.corrections]
        lm = lm_per_word(ranked[0]) if ranked else None
        words = tokenize(utterance.text)
        text_lm: dict[str, Any] = {}
        if self.lm is not None:
            text_lm = judged_text(self.lm, words)
            if self.line_lm is not None:
                mean, spread = self.line_lm
                text_lm["text_lm_relative"] = (text_lm["text_lm_per_word"] - mean) / spread
            if self.unseen is not None:
                # Per word of the result, entities included, as line_edit_relative is: counted over
                # the words other than entities, a result that lost a name would expect more unknown
                # words for it, and its garble would be excused (measured: relay/workbench/README.md).
                text_lm["text_oov_relative"] = text_lm["text_oov"] - self.unseen * len(words)
        # Between the steps whose cost grows with the text: a late message stops here.
        utterance.check_deadline()
        marked = marked_tokens(utterance)
        in_domain: dict[str, Any] = {}
        if self.carriers is not None:
            empty = self.carriers.unfilled(marked)
            in_domain = {"unfilled_slots": int(empty is not None), "unfilled_type": empty and empty.type}
            utterance.check_deadline()
        if self.lines is not None:
            nearest = self.lines.nearest(marked)
            if nearest is not None:
                own = self.lines_own_share
                odds = self.missing_odds
                in_domain |= {"line_edits": nearest.edits, "missing_slots": nearest.missing,
                              "line_edit_relative": None if own is None else edit_share(nearest.edits, len(words)) - own,
                              "missing_slot_odds": None if odds is None else nearest.missing * odds,
                              "missing_type": nearest.missing_type, "foreign_slots": nearest.foreign}
            utterance.check_deadline()
        conf = recogniser_confidence(utterance)
        return GateFeatures(
            posterior=top,
            margin=top - runner_up,
            weakest_entity=min(entity_scores) if entity_scores else None,
            corrected=bool(utterance.corrections),
            correction_score=min(correction_scores) if correction_scores else None,
            lm_per_word=lm,
            safety_rule=self.safety.check(utterance, marked),
            empty=not utterance.text.strip(),
            entities=len(utterance.entities),
            corrections=len(utterance.corrections),
            words=len(words),
            asr_log_conf=conf,
            asr_no_conf=int(conf is None) if self.settings.asr_gives_conf else None,
            asr_word_mean=recogniser_word_confidence(utterance),
            **backing(utterance, len(words)),
            **text_lm,
            **in_domain,
        )

    def process(self, utterance: Utterance) -> Utterance:
        features = self.features(utterance)
        model = self.settings.model()
        if self._conf_checked < CONF_CHECK_MESSAGES and features.asr_no_conf is not None:
            self._check_conf(features.asr_no_conf == 0, model)
        why: dict[str, Any] = {}
        sure = None
        if model is not None and not features.empty:
            values = features.values()
            sure = confidence(values, model)
            terms = contributions(values, model)
            # What weighed most, so a reader sees why: the three largest terms of the log-odds.
            why = {"confidence": round(sure, 4), "accept_at": self.settings.accept_confidence,
                   "reprompt_at": self.settings.reprompt_confidence,
                   "weighed": {n: round(t, 3) for n, t in sorted(terms.items(), key=lambda i: -abs(i[1]))[:3]}}
        decision, rule = decide(features, self.settings, sure=sure)
        utterance.decision = decision
        utterance.prompt = prompt_for(utterance, decision, rule, features, self.settings)
        # A shallow copy of the features: dataclasses.asdict deep-copies, 6% of the chain's time.
        utterance.note(rule=rule, decision=decision, **why, **{k: getattr(features, k) for k in _FEATURE_NAMES})
        return utterance

"""What the gate looks at, recorded once per utterance: ``GateFeatures`` and how they are read
from a finished utterance (the recogniser's own confidence, the result with its entities marked,
how the in-domain language model judges it)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from relay.core.utterance import Utterance
from stages.indomain.carriers import CarrierPhrases
from stages.lm.model import score_tokens

__all__ = ["ASR_LOG_FLOOR", "GateFeatures", "judged_text", "marked_tokens", "recogniser_confidence"]

# The recogniser's confidence enters as a natural log, floored here: a sentence posterior that
# underflowed to 0 must not become -inf (pocketsphinx's reach about -30 on noisy workshop audio).
ASR_LOG_FLOOR = -40.0


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


def recogniser_confidence(utterance: Utterance) -> float | None:
    """Natural log of the highest ``conf`` (FORMATS section 1) the recogniser gave any hypothesis,
    read from the message as received; None when it gave none. A recogniser that scores only its
    best path (pocketsphinx: the lattice posterior of the best path) puts it on that entry."""
    entries = utterance.payload.get("nbest") or []  # as received: merging duplicates drops entries
    given = [float(c) for h in entries if isinstance(h, dict) and isinstance(c := h.get("conf"), (int, float))]
    if not given:
        return None
    top = max(given)
    return max(math.log(top), ASR_LOG_FLOOR) if top > 0 else ASR_LOG_FLOOR


def marked_tokens(utterance: Utterance) -> list[str]:
    """The result's tokens with each entity's span replaced by its ``{type}`` marker."""
    return CarrierPhrases.marked(utterance.text, [(e.span[0], e.span[1], e.type) for e in utterance.entities])


def judged_text(model: Any, words: list[str]) -> dict[str, Any]:
    """How the LM sees the finished text: natural log per word (``</s>`` counted), its least
    likely word, and the words it has never seen."""
    score = score_tokens(model, words)
    return {"text_lm_per_word": score.per_word, "text_lm_weakest": score.weakest, "text_oov": score.oov}

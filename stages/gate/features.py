"""What the gate looks at, recorded once per utterance: ``GateFeatures`` and how they are read
from a finished utterance (the recogniser's own confidence, the result with its entities marked,
how the in-domain language model judges it)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from relay.core.utterance import Utterance
from stages.indomain.carriers import CarrierPhrases
from stages.indomain.text import read_sentences, read_slot_values
from stages.lm.model import score_tokens
from stages.normalize.word_probs import first_word_probs

__all__ = ["ASR_LOG_FLOOR", "GateFeatures", "backing", "edit_share", "judged_text", "line_scores", "marked_tokens",
           "recogniser_confidence", "recogniser_word_confidence"]

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
    missing_slots: int | None = None  # slots of that nearest line beyond the result's entities
    missing_type: str | None = None  # the first such slot's entity type
    foreign_slots: int | None = None  # entities whose type that nearest line has no slot for
    asr_log_conf: float | None = None  # ln of the highest `conf` the recogniser gave; None: it gave none
    asr_word_mean: float | None = None  # mean ln of the first hypothesis's `word_probs`; None: not given
    # 1 when no hypothesis carries a `conf`; None when the recogniser is said never to give one
    # (gate setting asr_gives_conf: false). Left to asr_log_conf alone, a missing confidence counted
    # as the training mean: the pocketsphinx bridge gives one only when its best path is among the
    # listed hypotheses, which on noisy audio it mostly is not, so its worst results were read as
    # average ones (relay/workbench/README.md, 'No confidence given').
    asr_no_conf: int | None = None
    # How the N-best backs the entities (the lexicon stage's evidence); None without entities.
    weakest_support: float | None = None  # least posterior share of hypotheses that hold an entity by sound
    weakest_heard: float | None = None  # least posterior share of hypotheses that hold an entity word for word
    weakest_lead: float | None = None  # least lead of an entity over the next entry for its words
    most_overridden: float | None = None  # most belief in the heard words that a correction overwrote
    invented: int = 0  # corrections into an entity that no hypothesis holds word for word
    rewritten: float = 0.0  # share of the result's words that corrections put there
    text_lm_relative: float | None = None  # text_lm_per_word in standard deviations from the in-domain lines'
    line_edit_relative: float | None = None  # line edits per word less the in-domain lines' own (NearestLine.own_share)
    # missing_slots times the log-odds against an in-domain line naming no entity
    # (stages.indomain.line_stats.entity_free_share): a slot left unfilled weighs more in a trade
    # whose requests nearly always name something.
    missing_slot_odds: float | None = None
    # text_oov less the unknown words expected in that many words of in-domain text
    # (stages.indomain.line_stats.unseen_share times the result's words)
    text_oov_relative: float | None = None

    def values(self) -> dict[str, float | None]:
        """The numeric features by name, as ``stages.gate.confidence`` reads them."""
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
            "missing_slots": None if self.missing_slots is None else float(self.missing_slots),
            "foreign_slots": None if self.foreign_slots is None else float(self.foreign_slots),
            "asr_log_conf": self.asr_log_conf,
            "asr_no_conf": None if self.asr_no_conf is None else float(self.asr_no_conf),
            "asr_word_mean": self.asr_word_mean,
            # Without entities there is no evidence to weigh: unknown (a model counts its training
            # mean). As 1, the values of a sure entity, a result that found no entity at all (most
            # often a missed one) pushed these weights the wrong way: fitted on the examples, every
            # one of them came out against its sign and a correction that no hypothesis heard no
            # longer lowered the confidence.
            "weakest_support": self.weakest_support,
            "weakest_heard": self.weakest_heard,
            "weakest_lead": self.weakest_lead,
            "most_overridden": self.most_overridden,
            "invented": float(self.invented),
            "rewritten": self.rewritten,
            "text_lm_relative": self.text_lm_relative,
            "line_edit_share": None if self.line_edits is None else edit_share(self.line_edits, self.words),
            "line_edit_relative": self.line_edit_relative,
            "missing_slot_odds": self.missing_slot_odds,
            "text_oov_relative": self.text_oov_relative,
        }


def edit_share(edits: int, words: int) -> float:
    """Word edits to the nearest in-domain line per word of the result."""
    return edits / max(1, words)


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


def recogniser_word_confidence(utterance: Utterance) -> float | None:
    """Mean natural log of the per-word probabilities the recogniser gave its first hypothesis
    (``word_probs``, an optional list of numbers in [0, 1] beside ``conf``, as the Whisper bridge
    writes it), each floored at ASR_LOG_FLOOR; None when it gave none or the list is not numbers
    in [0, 1]."""
    given = first_word_probs(utterance)
    if given is None:
        return None
    return sum(max(math.log(p), ASR_LOG_FLOOR) if p > 0 else ASR_LOG_FLOOR for p in given) / len(given)


def marked_tokens(utterance: Utterance) -> list[str]:
    """The result's tokens with each entity's span replaced by its ``{type}`` marker."""
    return CarrierPhrases.marked(utterance.text, [(e.span[0], e.span[1], e.type) for e in utterance.entities])


def judged_text(model: Any, words: list[str]) -> dict[str, Any]:
    """How the LM sees the finished text: natural log per word (``</s>`` counted), its least
    likely word, and the words it has never seen."""
    score = score_tokens(model, words)
    return {"text_lm_per_word": score.per_word, "text_lm_weakest": score.weakest, "text_oov": score.oov}


def backing(utterance: Utterance, words: int) -> dict[str, Any]:
    """The entities' evidence as features: the weakest of each kind, the strongest heard reading a
    correction overrode, corrections that invent."""
    entities = utterance.entities
    out: dict[str, Any] = {}
    for name, attribute, worst in (("weakest_support", "support", min), ("weakest_heard", "heard_exactly", min),
                                   ("weakest_lead", "margin", min), ("most_overridden", "overridden", max)):
        known = [value for e in entities if (value := getattr(e, attribute)) is not None]
        out[name] = worst(known) if known else None
    # An entity a correction wrote, read by its words in the text: a correction may write an alias
    # ("quillan" for the quillan router), which the entry's name would not match.
    corrected = {c.after for c in utterance.corrections}
    out["invented"] = sum(1 for e in entities
                          if utterance.text[e.span[0]:e.span[1]] in corrected and not e.heard_exactly)
    out["rewritten"] = sum(len(c.after.split()) for c in utterance.corrections) / max(1, words)
    return out


def line_scores(model: Any, text: Path, lexicon: Path | None) -> tuple[float, float] | None:
    """Mean and standard deviation of the LM's natural log per word over the in-domain lines
    (slots filled from the lexicon): how the model scores text it knows, to judge a result by."""
    slots = read_slot_values(lexicon) if lexicon is not None else None
    scores = [score_tokens(model, tokens).per_word for tokens in read_sentences([text], slots=slots)]
    if len(scores) < 2:
        return None
    mean = sum(scores) / len(scores)
    spread = (sum((s - mean) ** 2 for s in scores) / (len(scores) - 1)) ** 0.5
    return mean, max(spread, 1e-3)

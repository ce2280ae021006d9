"""What every way of finding entries hands back: an entry placed on words of the top hypothesis.

The top hypothesis is the one whose text the stage rewrites (``Utterance.best``); a ``Choice``
holds its word range there, whichever hypothesis the evidence came from.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import CompiledLexicon
from stages.lexicon.match import Evidence

__all__ = ["STRONG", "Choice", "describe", "holding", "likeliest", "reading_otherwise", "support"]


@dataclass(frozen=True, slots=True)
class Choice:
    """An entry placed on a word range of the top hypothesis, with the score that placed it."""

    evidence: Evidence
    score: float
    start: int  # word range in the top hypothesis
    end: int
    form: int
    exact: bool  # the words already are the form's text: kept, not rewritten
    hint_missing: bool  # the entry's type has hint words and none stands before the range
    lm_gain: float = 0.0
    origin: str = "general"  # the way of finding entries that placed it: general, anchored, carrier
    margin: float | None = None  # the lead over the runner-up entry that search measured, if it did

    def overlaps(self, other: Choice) -> bool:
        return self.start < other.end and other.start < self.end


def describe(choice: Choice, lexicon: CompiledLexicon, tokens: Sequence[str]) -> dict[str, Any]:
    """The trace record of a candidate (the keys are part of the trace format)."""
    return {"id": lexicon.entries[choice.evidence.entry].id,
            "heard": " ".join(tokens[choice.start:choice.end]),
            "form": lexicon.forms[choice.form].text, "score": round(choice.score, 4),
            "pooled": round(choice.evidence.pooled, 4), "lm_gain": round(choice.lm_gain, 3),
            "hypotheses": len(choice.evidence.per_hypothesis)}


STRONG = 0.75  # a sighting at least this close by sound counts as the hypothesis holding the entry


def holding(choice: Choice) -> set[int]:
    """The hypotheses that hold the choice's entry by a strong sound match."""
    return {h for h, seen in choice.evidence.per_hypothesis.items() if seen.score >= STRONG}


def reading_otherwise(choice: Choice, nbest: Sequence[Hypothesis], words: Sequence[str]) -> set[int]:
    """The hypotheses whose strong match of the entry lies on other words than ``words`` (the
    run the correction would rewrite): they heard the name there ("pellow table saw" around
    "table"), so their ``words`` are part of it, not said on their own."""
    run = list(words)
    sightings = choice.evidence.per_hypothesis
    return {h for h in holding(choice) if nbest[h].tokens[sightings[h].start:sightings[h].end] != run}


def support(choice: Choice, nbest: Sequence[Hypothesis]) -> float:
    """Posterior share of hypotheses that hold the choice's entry by a strong sound match."""
    return sum(nbest[h].posterior for h in holding(choice))


def likeliest(nbest: Sequence[Hypothesis], top: int, count: int) -> list[int]:
    """``top`` and then the likeliest other hypotheses, ``count`` in all."""
    others = sorted((h for h in range(len(nbest)) if h != top), key=lambda h: -nbest[h].posterior)
    return [top] + others[: count - 1]

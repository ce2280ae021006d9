"""The reading every correction competes with: the words were heard right.

A speaker may say things the lexicon does not hold. Words heard the same way by the whole
N-best ("first thing tomorrow" in every hypothesis), that are everyday words of the language,
are likely what was said, however near they sound to an entry ("dunmorrow"). How likely is
the product of two shares: how much of the N-best's probability holds exactly those words,
and how common they are (their Zipf frequency, from the shipped common-word list, scaled to
0 below ``RARE`` and 1 from ``COMMON``). Where the recogniser says how sure it was of each word
(`word_probs`, stages.normalize.word_probs), a third factor: the mean of those probabilities
over the words, raised to an exponent (``recogniser_sureness``). Whisper agrees with itself across its
N-best on a name it turned into everyday words ("taigh mara" as "time are on" in every
hypothesis), but it is less sure of those words than of words said as heard. A correction must
then beat its search's floor by a weight times that belief; the belief with the third factor has
a scale of its own, so it has a weight of its own.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping, Sequence

from relay.core.utterance import Hypothesis

__all__ = ["COMMON", "RARE", "heard_belief", "heard_reading", "recogniser_sureness"]

RARE = 2.0  # below any word of the shipped list (it starts at Zipf 2.97): as likely a name as a word
COMMON = 4.5  # about three times per hundred thousand words: everyday speech


# English inflections, longest first: an inflected everyday word ("dusted", "pallets") is an
# everyday word too, though the frequency list may hold only its stem.
_SUFFIXES = ("ing", "ies", "ied", "es", "ed", "er", "s", "d", "y")


def _frequency(word: str, zipf: Mapping[str, float]) -> float:
    known = zipf.get(word)
    if known is not None:
        return known
    # The possessive or the clitic "is"/"has" of an everyday word ("the power's gone", "the boat's
    # keel") is an everyday word too: the list holds "it's" and "people's", not every noun's.
    if word.endswith("'s") and len(word) > 4:
        return max(0.0, _frequency(word[:-2], zipf) - 0.5)
    if word.endswith("s'") and len(word) > 4:
        return max(0.0, _frequency(word[:-1], zipf) - 0.5)
    for suffix in _SUFFIXES:
        if word.endswith(suffix) and len(word) - len(suffix) >= 3:
            stem = word[: -len(suffix)]
            for candidate in (stem, stem + "e", stem + "y", stem[:-1] if stem[-1:] == stem[-2:-1] else stem):
                if candidate in zipf:
                    return zipf[candidate] - 0.5  # an inflected form is somewhat rarer than its stem
    return 0.0


def _commonness(word: str, zipf: Mapping[str, float]) -> float:
    return min(1.0, max(0.0, (_frequency(word, zipf) - RARE) / (COMMON - RARE)))


def recogniser_sureness(probs: Sequence[float | None] | None, exponent: float) -> float | None:
    """The mean of the recogniser's probabilities of a run of words (None where not known),
    raised to ``exponent``; None when none is known or ``exponent`` is 0."""
    known = [p for p in probs if p is not None] if probs and exponent else []
    return (sum(known) / len(known)) ** exponent if known else None


def heard_belief(words: Sequence[str], nbest: Sequence[Hypothesis], zipf: Mapping[str, float], *,
                 holding: Collection[int] = ()) -> float:
    """Belief in [0, 1] that ``words`` (a run of the top hypothesis) were said as heard, from
    the N-best and the language alone (``heard_reading`` adds the recogniser's sureness).

    ``holding`` are the hypotheses that read the words as part of the name ("pellow table saw"
    around "table"), not as said; they do not count for the heard reading.
    """
    if not words:
        return 0.0
    # Tokens hold no spaces, so a run of them stands in a hypothesis exactly when its words,
    # space-delimited, are a substring of the hypothesis's (one C search instead of a slice per place).
    needle = " " + " ".join(words) + " "
    agreement = sum(h.posterior for number, h in enumerate(nbest) if number not in holding
                    and needle in " " + " ".join(h.tokens) + " ")
    return min(1.0, agreement) * sum(_commonness(w, zipf) for w in words) / len(words)


def heard_reading(words: Sequence[str], nbest: Sequence[Hypothesis], zipf: Mapping[str, float], *,
                  holding: Collection[int], probs: Sequence[float | None] | None,
                  sureness: float) -> tuple[float, bool]:
    """The heard-as-said belief of ``words``, times ``recogniser_sureness`` of their ``probs``
    where any is known; and whether it was (that belief has a weight of its own)."""
    belief = heard_belief(words, nbest, zipf, holding=holding)
    sure = recogniser_sureness(probs, sureness)
    return (belief, False) if sure is None else (belief * sure, True)

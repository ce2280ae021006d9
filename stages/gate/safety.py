"""The gate's safety rule: a command that can move machinery, open a valve or dose a chemical is
never accepted on voice alone, whatever the scores say."""

from __future__ import annotations

from collections.abc import Sequence

from relay.core.utterance import Utterance
from stages.gate.features import marked_tokens
from stages.indomain.carriers import replace_runs, runs_by_first_word
from stages.normalize.tokens import tokenize

__all__ = ["SafetyRule"]


class SafetyRule:
    """Safety words (phrases) and entity types that make a result ask back."""

    def __init__(self, words: Sequence[str], types: Sequence[str], *, min_posterior: float) -> None:
        phrases = [tuple(tokenize(p)) for p in words]
        self._phrases = sorted({p for p in phrases if p}, key=len, reverse=True)
        # Phrases by their first word, each with its place in the longest-first order.
        self._starting: dict[str, list[tuple[int, tuple[str, ...]]]] = {}
        for order, phrase in enumerate(self._phrases):
            self._starting.setdefault(phrase[0], []).append((order, phrase))
        self._types = frozenset(types)
        self._min_posterior = min_posterior

    def check(self, utterance: Utterance, marked: list[str] | None = None) -> str | None:
        """Which safety rule the result trips, if any (by entity type first, then by words).

        A likely runner-up counts too: "stat the lathe" on top of "start the lathe" may
        well have been a start command, and accepting it must not be how one slips through.
        Words inside a found entity's name do not count (entity types have their own rule).
        ``marked`` is the result's tokens with the entities' spans replaced (``marked_tokens``).
        """
        for entity in utterance.entities:
            if entity.type in self._types:
                return f"type:{entity.type}"
        # A word inside an entity's name is part of the name, not an order: "the heron lift is
        # making a noise" names a machine; "lift the pallet" still asks. In the result the
        # entities' spans are left out; in a runner-up, the same names and the words heard for them.
        names = runs_by_first_word((tuple(tokenize(form)), "") for e in utterance.entities for form in (e.name, e.heard))
        texts = [(utterance.text, tuple(marked if marked is not None else marked_tokens(utterance)))]
        texts += [(h.text, tuple(replace_runs(tokenize(h.text), names))) for h in utterance.ranked()
                  if h.posterior >= self._min_posterior]
        for text, words in texts:
            utterance.check_deadline()
            found = [(order, phrase) for i, word in enumerate(words) for order, phrase in self._starting.get(word, ())
                     if words[i:i + len(phrase)] == phrase]
            if found:
                phrase = min(found)[1]  # the longest phrase, as listed, when several occur
                return "word:" + " ".join(phrase) + ("" if text == utterance.text else " (runner-up)")
        return None

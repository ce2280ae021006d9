"""The recogniser's own word probabilities, laid onto the tokens the stages work on.

A recogniser may say how sure it is of each word of its first hypothesis (FORMATS, `word_probs`
beside `conf`: one number in [0, 1] per whitespace-separated word of `text`, as the Whisper
bridge writes them). The stages work on normalised tokens instead ("7.30" is "seven thirty",
"Halcyra's" is "halcyra's"), and on the hypothesis the chain chose, which need not be the
first. ``token_probs`` gives each of those tokens the probability of the recogniser's word it
came from: every word of the first hypothesis is normalised alone (a word that becomes two
tokens gives both its probability), and the tokens are aligned with the chosen ones word for
word (rapidfuzz opcodes); a token with no equal partner in the first hypothesis gets None.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache
from typing import Any

from rapidfuzz.distance import Levenshtein

from relay.core.utterance import Utterance
from stages.normalize.tokens import tokenize

__all__ = ["first_word_probs", "token_probs"]


@lru_cache(maxsize=8192)
def _word_tokens(word: str) -> tuple[str, ...]:
    # A recogniser's words repeat from message to message: each is normalised once.
    return tuple(tokenize(word))


def _first(utterance: Utterance) -> dict[str, Any]:
    """The first N-best entry as received (merging duplicates drops entries); {} when it is not an object."""
    entries = utterance.payload.get("nbest") or []
    return entries[0] if entries and isinstance(entries[0], dict) else {}


def first_word_probs(utterance: Utterance) -> list[float] | None:
    """The ``word_probs`` of the first hypothesis as received; None when it gave none or the list
    is not numbers in [0, 1]."""
    given = _first(utterance).get("word_probs")
    if not isinstance(given, list) or not given:
        return None
    if not all(isinstance(p, (int, float)) and not isinstance(p, bool) and 0.0 <= p <= 1.0 for p in given):
        return None
    return [float(p) for p in given]


def token_probs(utterance: Utterance, tokens: Sequence[str]) -> list[float | None] | None:
    """For each of ``tokens`` (a hypothesis of ``utterance`` after normalisation), the
    probability the recogniser gave the word it came from, None where it cannot be told; None
    for all when the recogniser gave no word probabilities or they do not match its text's words."""
    probs = first_word_probs(utterance)
    if probs is None:
        return None
    text = _first(utterance).get("text")
    words = text.split() if isinstance(text, str) else []
    if len(words) != len(probs):
        return None
    heard: list[str] = []
    per_token: list[float] = []
    for word, p in zip(words, probs):
        pieces = _word_tokens(word)
        heard += pieces
        per_token += [p] * len(pieces)
    if heard == list(tokens):
        return list(per_token)
    out: list[float | None] = [None] * len(tokens)
    for op in Levenshtein.opcodes(heard, list(tokens)):
        if op.tag == "equal":
            out[op.dest_start:op.dest_end] = per_token[op.src_start:op.src_end]
    return out

"""The recogniser's word probabilities laid onto normalised tokens (FORMATS: `word_probs`, one per
whitespace-separated word of the first hypothesis's `text`)."""

from __future__ import annotations

from typing import Any

from relay.core.utterance import Hypothesis, Utterance
from stages.normalize.tokens import tokenize
from stages.normalize.word_probs import first_word_probs, token_probs


def _utterance(first: dict[str, Any]) -> Utterance:
    return Utterance("u1", "test", None, {"nbest": [first]}, [Hypothesis(first.get("text", ""), 0, first)])


def test_each_token_gets_the_probability_of_the_word_it_came_from() -> None:
    utt = _utterance({"text": "Move Halcyra's tender at 7.30.", "word_probs": [0.9, 0.2, 0.8, 0.95, 0.6]})
    tokens = tokenize("Move Halcyra's tender at 7.30.")
    assert tokens == ["move", "halcyra's", "tender", "at", "seven", "point", "three", "zero"]
    # "7.30" is four tokens, each with the probability of the word it came from.
    assert token_probs(utt, tokens) == [0.9, 0.2, 0.8, 0.95, 0.6, 0.6, 0.6, 0.6]
    # The clock reading the LM may choose ("seven thirty") keeps what it shares with the first.
    assert token_probs(utt, ["move", "halcyra's", "tender", "at", "seven", "thirty"]) == [0.9, 0.2, 0.8, 0.95, 0.6, None]


def test_a_chosen_hypothesis_other_than_the_first_is_aligned_word_for_word() -> None:
    utt = _utterance({"text": "lift the bell we are all at two", "word_probs": [0.9, 0.8, 0.3, 0.4, 0.5, 0.6, 0.9, 0.7]})
    probs = token_probs(utt, "lift velmira at two".split())
    assert probs == [0.9, None, 0.9, 0.7]  # "velmira" stands for words the first hypothesis has otherwise


def test_missing_or_malformed_word_probabilities_give_none() -> None:
    assert first_word_probs(_utterance({"text": "a b"})) is None
    assert first_word_probs(_utterance({"text": "a b", "word_probs": [0.5, 1.5]})) is None  # not a probability
    assert first_word_probs(_utterance({"text": "a b", "word_probs": [True, 0.5]})) is None  # not a number
    assert first_word_probs(_utterance({"text": "a b", "word_probs": "0.5 0.5"})) is None
    assert token_probs(_utterance({"text": "a b c", "word_probs": [0.5, 0.5]}), ["a", "b", "c"]) is None  # counts differ
    assert first_word_probs(_utterance({"text": "a b", "word_probs": [0, 1]})) == [0.0, 1.0]

"""Choices placed in the top hypothesis: overlap, the trace record, the likeliest hypotheses."""

from __future__ import annotations

from relay.core.utterance import Hypothesis
from stages.lexicon.choice import Choice, describe, likeliest
from stages.lexicon.compile import compile_entries
from stages.lexicon.data import LexiconEntry
from stages.lexicon.match import Evidence, Sighting
from stages.lexicon.sound.pronounce import Pronouncer


def test_likeliest_puts_the_top_hypothesis_first_then_by_posterior() -> None:
    nbest = [Hypothesis(text, rank, {}) for rank, text in enumerate("abcd")]
    for hypothesis, posterior in zip(nbest, (0.1, 0.2, 0.4, 0.3)):
        hypothesis.posterior = posterior
    assert likeliest(nbest, 0, 3) == [0, 2, 3]
    assert likeliest(nbest, 2, 10) == [2, 3, 1, 0]
    assert likeliest(nbest, 1, 1) == [1]


def test_overlap_needs_a_shared_word() -> None:
    evidence = Evidence(0, 0.5, {})

    def at(start: int, end: int) -> Choice:
        return Choice(evidence, 0.5, start, end, 0, False, False)

    assert at(1, 3).overlaps(at(2, 4)) and at(2, 4).overlaps(at(1, 3))
    assert not at(1, 3).overlaps(at(3, 5)) and not at(3, 5).overlaps(at(1, 3))
    assert at(0, 5).overlaps(at(2, 3))


def test_the_trace_record_keeps_its_keys_and_rounding() -> None:
    entry = LexiconEntry("term.kerf", "term", "kerf", (), "kurf", 1.0, 2)
    lexicon = compile_entries([entry], Pronouncer())
    evidence = Evidence(0, 0.512345, {0: Sighting(0.9, 1, 2, 0, False), 2: Sighting(0.4, 1, 2, 0, False)})
    choice = Choice(evidence, 0.7654321, 1, 2, 0, False, False, lm_gain=1.23456)
    assert describe(choice, lexicon, ["the", "curf", "here"]) == {
        "id": "term.kerf", "heard": "curf", "form": "kerf", "score": 0.7654, "pooled": 0.5123, "lm_gain": 1.235,
        "hypotheses": 2}
    assert list(describe(choice, lexicon, ["the", "curf", "here"])) == [
        "id", "heard", "form", "score", "pooled", "lm_gain", "hypotheses"]

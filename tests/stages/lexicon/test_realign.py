"""Pooling that realigns the hypotheses (stages/lexicon/realign.py), against the pair scorer's
own definition: a restored sighting scores what score_spans gives that span and form."""

from __future__ import annotations

import pytest

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import compile_entries
from stages.lexicon.data import LexiconEntry
from stages.lexicon.match import Weights, find_spans, pool, score_spans
from stages.lexicon.realign import realign
from stages.lexicon.settings import MatchSettings
from stages.lexicon.sound.phonetics import CostModel
from stages.lexicon.sound.pronounce import Pronouncer
from tests.stages.lexicon.fixtures import pair_scores


def test_realign_scores_the_aligned_words_of_a_hypothesis_that_lacks_the_entry() -> None:
    pronouncer = Pronouncer()
    # Three moorings. The middle hypothesis heard "birthdays"; its sighting of berth six is taken
    # away, as when a large lexicon's index hands back other forms there, so that hypothesis
    # counts 0 in berth six's pooled score until realign scores the words aligned with "birth six".
    entries = [LexiconEntry(f"m{i}", "mooring", name, (), None, 1.0, i + 2)
               for i, name in enumerate(["berth six", "berth two", "berth one"])]
    lexicon = compile_entries(entries, pronouncer, max_postings=60)
    texts = ["rubbing on birth six", "rubbing on birthdays", "rubbing on birthsticks"]
    nbest = [Hypothesis(t, r, {}, tokens=t.split(), posterior=p) for r, (t, p) in enumerate(zip(texts, (0.3, 0.5, 0.2)))]
    spans = find_spans(nbest, lexicon.max_words + 1, pronouncer)
    weights, costs = Weights.of(MatchSettings()), CostModel.features()
    evidence = pool(spans, score_spans(spans, lexicon, weights, costs), lexicon, [h.posterior for h in nbest])
    six = evidence[0]
    kept = six.per_hypothesis[0]  # "birth six", which hypothesis 0 holds
    dropped = six.per_hypothesis.pop(1)  # as when the index does not hand it back there
    six.pooled = sum(nbest[h].posterior * s.score for h, s in six.per_hypothesis.items())
    before = six.pooled
    realign(evidence, [six], spans, lexicon, nbest, weights, costs, slack=1)
    restored = six.per_hypothesis[1]
    # "birthdays" (word 2 of hypothesis 1) is what lines up with "birth six" (words 2-3 of hypothesis 0).
    assert (restored.start, restored.end, lexicon.forms[restored.form].text) == (2, 3, "berth six")
    # Scored as score_spans' own definition scores that span against that form.
    q = spans.texts.index("birthdays")
    [(_, _, expected, _)] = pair_scores(spans, lexicon, weights, costs, [(q, restored.form)])
    assert restored.score == pytest.approx(expected, abs=1e-12)
    # Here the index had handed it back: the same pair, so the same score as retrieval gave.
    assert restored.score == pytest.approx(dropped.score, abs=1e-12)
    assert six.pooled == pytest.approx(before + 0.5 * restored.score, abs=1e-12)
    # A hypothesis that already holds the entry keeps its own sighting, untouched.
    assert six.per_hypothesis[0] is kept


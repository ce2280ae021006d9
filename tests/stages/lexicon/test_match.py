"""Span scoring in batches against the pair-by-pair definition it replaces.

score_spans computes the spelling and key terms of all pairs at once (rapidfuzz cpdist) and
sums the terms as arrays; these tests hold it to the plain definition, one pair at a time with
rapidfuzz's own scorers, bit for bit.
"""

from __future__ import annotations

import dataclasses
import random

import pytest
from rapidfuzz.distance import Levenshtein

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import CompiledLexicon, compile_entries, phonetic_keys
from stages.lexicon.data import LexiconEntry
from stages.lexicon.match import Sighting, Spans, Weights, _key_agreements, find_spans, pool, score_spans
from stages.lexicon.settings import MatchSettings
from stages.lexicon.sound.phonetics import CostModel
from stages.lexicon.sound.pronounce import Pronouncer
from tests.stages.lexicon.fixtures import pair_scores

_SYLLABLES = ["ka", "lo", "mir", "ta", "sen", "dru", "vo", "ne", "pal", "rik", "sho", "bel", "tam", "zin"]
_WORDS = ["bay", "three", "check", "the", "pump", "at", "station", "oven", "band", "saw", "for", "near"]


def _name(rng: random.Random) -> str:
    return " ".join("".join(rng.choice(_SYLLABLES) for _ in range(rng.randint(2, 3)))
                    for _ in range(rng.randint(1, 2)))


def _misheard(word: str, rng: random.Random) -> str:
    if len(word) < 3:
        return word
    i = rng.randrange(1, len(word) - 1)
    return word[:i] + rng.choice("aeioulnrst") + word[i + 1:]


@pytest.fixture(scope="module")
def pronouncer() -> Pronouncer:
    return Pronouncer()


@pytest.fixture(scope="module")
def lexicon(pronouncer: Pronouncer) -> CompiledLexicon:
    rng = random.Random(3)
    names = sorted({_name(rng) for _ in range(300)})
    entries = [LexiconEntry(f"e{i}", "thing", name, (name.split()[0],) if " " in name else (), None, 1.0, i + 2)
               for i, name in enumerate(names)]
    return compile_entries(entries, pronouncer, max_postings=60)


def _nbest(lexicon: CompiledLexicon, rng: random.Random) -> list[Hypothesis]:
    name = rng.choice(lexicon.entries).name.split()
    hypotheses = []
    for rank in range(6):
        words = [rng.choice(_WORDS) for _ in range(6)]
        heard = name if rank == 0 else [_misheard(w, rng) for w in name]
        at = rng.randrange(0, len(words) - len(heard) + 1)
        words[at:at + len(heard)] = heard
        hypotheses.append(Hypothesis(" ".join(words), rank, {}, tokens=words, posterior=1.0 / (rank + 2)))
    return hypotheses


def _pairwise(spans: Spans, lexicon: CompiledLexicon, weights: Weights,
              costs: CostModel) -> list[tuple[int, int, float, bool]]:
    """The definition: exact pairs, then each retrieved pair past the screen scored on its own."""
    pairs: list[tuple[int, int, float, bool]] = []
    exact: set[tuple[int, int]] = set()
    for number, text in enumerate(spans.texts):
        for form in lexicon.exact.get(text, ()):
            pairs.append((number, form, 1.0, True))
            exact.add((number, form))
    hits = lexicon.index.search(spans.phones, k=weights.candidates, min_score=weights.min_retrieval)
    forms = lexicon.forms
    chosen = [(q, f) for q, f in zip(hits.query.tolist(), hits.item.tolist())
              if Levenshtein.normalized_similarity(spans.phones[q], forms[f].phones) >= weights.align_floor
              and (q, f) not in exact]
    return pairs + pair_scores(spans, lexicon, weights, costs, chosen)


def test_key_agreements_are_the_best_levenshtein_similarity_of_any_key_pair(lexicon: CompiledLexicon) -> None:
    runs = [("tamzin", "okara"), ("x",), ("schmidt",)]  # "schmidt" has two keys (XMT, SMT)
    spans = Spans(runs, ["", "", ""], [" ".join(words) for words in runs], [[], [], []])
    assert len(phonetic_keys("schmidt")) == 2
    chosen = [(q, f) for q in range(len(spans)) for f in range(0, len(lexicon.forms), 7)]
    got = _key_agreements(chosen, spans, lexicon.forms).tolist()
    expected = [max(Levenshtein.normalized_similarity(x, y) for x in phonetic_keys(spans.texts[q])
                    for y in lexicon.forms[f].keys) for q, f in chosen]
    assert got == expected


@pytest.mark.parametrize("weights", [
    # The stage's defaults, through the phone index alone: the pairwise definition retrieves no other way.
    dataclasses.replace(Weights.of(MatchSettings()), broad_candidates=0, skeleton_candidates=0),
    Weights(0.5, 0.3, 0.2, 8, 0.1, 0.2, 0.3, 0.2),  # looser: more pairs reach every term
])
def test_batched_scores_equal_the_pairwise_definition(lexicon: CompiledLexicon, pronouncer: Pronouncer,
                                                      weights: Weights) -> None:
    rng = random.Random(11)
    costs = CostModel.features()
    compared = 0
    for _ in range(40):
        spans = find_spans(_nbest(lexicon, rng), lexicon.max_words + 1, pronouncer)
        got = score_spans(spans, lexicon, weights, costs)
        assert got == _pairwise(spans, lexicon, weights, costs)
        compared += sum(1 for pair in got if not pair[3])
    assert compared > 200  # fuzzy pairs, not only exact ones, were compared


def test_spans_and_pooling_keep_every_occurrence(lexicon: CompiledLexicon, pronouncer: Pronouncer) -> None:
    nbest = [Hypothesis("a b a b", 0, {}, tokens=["a", "b", "a", "b"], posterior=0.75),
             Hypothesis("b a", 1, {}, tokens=["b", "a"], posterior=0.25)]
    spans = find_spans(nbest, 2, pronouncer)
    assert spans.words == [("a",), ("a", "b"), ("b",), ("b", "a")]
    assert spans.texts == ["a", "a b", "b", "b a"]
    assert spans.occurrences[1] == [(0, 0, 2), (0, 2, 4)]
    assert spans.occurrences[3] == [(0, 1, 3), (1, 0, 2)]
    assert spans.phones[1] == pronouncer.word("a") + pronouncer.word("b")
    form = 0
    evidence = pool(spans, [(3, form, 0.5, False), (1, form, 0.5, False)], lexicon, [0.75, 0.25])
    found = evidence[lexicon.forms[form].entry]
    # Equal scores: the first span seen stays in hypothesis 0 (same length), hypothesis 1 has only "b a".
    assert found.per_hypothesis == {0: Sighting(0.5, 1, 3, form, False), 1: Sighting(0.5, 0, 2, form, False)}
    assert found.pooled == 0.75 * 0.5 + 0.25 * 0.5


@pytest.mark.parametrize("compiled_pool", [True, False])
def test_a_strong_near_match_of_the_full_name_beats_a_near_match_of_its_alias_inside_it(
        lexicon: CompiledLexicon, pronouncer: Pronouncer, compiled_pool: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # "qr e compressor" is a near match of "quarrie compressor"; "compressor" inside it, a nearer
    # one of the alias "the compressor". The full name explains more of the heard words.
    if not compiled_pool:
        monkeypatch.setattr("stages.lexicon.match.compiled", None)
    number, entry = next((i, e) for i, e in enumerate(lexicon.entries) if " " in e.name)
    first, second = entry.name.split()
    name = next(i for i, f in enumerate(lexicon.forms) if f.entry == number and f.text == entry.name)
    alias = next(i for i, f in enumerate(lexicon.forms) if f.entry == number and f.text == first)
    nbest = [Hypothesis(f"at {first} {second} now", 0, {}, tokens=["at", first, second, "now"], posterior=1.0)]
    spans = find_spans(nbest, 2, pronouncer)
    whole, inner = spans.words.index((first, second)), spans.words.index((first,))

    def sighting(name_score: float, alias_score: float, *, alias_first: bool) -> Sighting:
        pairs = [(whole, name, name_score, False), (inner, alias, alias_score, False)]
        evidence = pool(spans, pairs[::-1] if alias_first else pairs, lexicon, [1.0])
        return evidence[number].per_hypothesis[0]

    for alias_first in (False, True):
        # Strong (0.75 and up): the full name wins though the alias scored higher.
        assert sighting(0.8, 0.9, alias_first=alias_first) == Sighting(0.8, 1, 3, name, False)
        # Not strong: the higher score, as between any two near matches.
        assert sighting(0.7, 0.9, alias_first=alias_first) == Sighting(0.9, 1, 2, alias, False)


def test_the_longer_form_is_the_one_with_more_phones_not_more_words(pronouncer: Pronouncer) -> None:
    # "quarrie compressor" and its alias "the compressor" have two words each; heard "qr e
    # compressor", the full name (more phones) explains more of the sounds than the alias inside it.
    # Here too: two words each, "kalomir tasen" with more phones than "the tasen".
    entries = [LexiconEntry("e0", "thing", "kalomir tasen", ("the tasen",), None, 1.0, 2)]
    lexicon = compile_entries(entries, pronouncer, max_postings=60)
    name = next(i for i, f in enumerate(lexicon.forms) if f.text == "kalomir tasen")
    alias = next(i for i, f in enumerate(lexicon.forms) if f.text == "the tasen")
    nbest = [Hypothesis("at kalo mir tasen now", 0, {}, tokens=["at", "kalo", "mir", "tasen", "now"], posterior=1.0)]
    spans = find_spans(nbest, 3, pronouncer)
    whole, inner = spans.words.index(("kalo", "mir", "tasen")), spans.words.index(("tasen",))
    evidence = pool(spans, [(inner, alias, 0.9, False), (whole, name, 0.8, False)], lexicon, [1.0])
    assert evidence[0].per_hypothesis[0] == Sighting(0.8, 1, 4, name, False)

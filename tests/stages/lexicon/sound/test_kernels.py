"""The compiled kernels (stages/_lexfast.c) against the numpy code they stand in for.

Both paths must give the same bits: the same hits in the same order with the same float32
scores, and the same float32 alignment costs. Where the module is not built these tests skip,
except under CI=true, where ``pip install`` must have compiled it and they fail instead.
"""

from __future__ import annotations

import os
import pickle
import random
from collections.abc import Callable

import jiwer
import numpy as np
import numpy.typing as npt
import pytest
from rapidfuzz.distance import Levenshtein
from rapidfuzz.fuzz import ratio
from rapidfuzz.process import cpdist

from relay.core.utterance import Hypothesis
from relay.workbench.phone_channel import PhonePair, fit_channel, to_costs
from stages.lexicon import match
from stages.lexicon.compile import CompiledLexicon, compile_entries
from stages.lexicon.data import LexiconEntry
from stages.lexicon.match import (
    Evidence,
    Sighting,
    Spans,
    Weights,
    _pool_python,
    _word_spans_python,
    find_spans,
    pool,
    score_spans,
)
from stages.lexicon.settings import MatchSettings
from stages.lexicon.sound import phone_index
from stages.lexicon.sound.kernels import compiled
from stages.lexicon.sound.phone_index import Hits, PhoneIndex
from stages.lexicon.sound.phonetics import (
    BROAD_CLASSES,
    BROAD_CODES,
    PHONES,
    SKELETON_CLASSES,
    SKELETON_CODES,
    CostModel,
    _batch_alignment_cost_compiled,
    _batch_alignment_cost_numpy,
    broad,
    encode,
    skeleton,
)
from stages.lexicon.sound.pronounce import Pronouncer

if compiled is None:
    if os.environ.get("CI") == "true" and os.environ.get("REHEAR_NO_COMPILED", "") in ("", "0"):
        pytest.fail("the compiled kernels are not built (pip install -e . should build stages/_lexfast)",
                    pytrace=False)
    pytest.skip("the compiled kernels are not built", allow_module_level=True)


def random_phones(rng: random.Random, shortest: int, longest: int, inventory: int = len(PHONES)) -> str:
    return encode(rng.choices(PHONES[:inventory], k=rng.randint(shortest, longest)))


def same_bits(x: np.ndarray, y: np.ndarray) -> bool:
    return x.dtype == y.dtype and x.shape == y.shape and x.tobytes() == y.tobytes()


def same_hits(a: Hits, b: Hits) -> bool:
    return same_bits(a.query, b.query) and same_bits(a.item, b.item) and same_bits(a.score, b.score)


def learned_model() -> CostModel:
    """Costs as `rehear learn-costs` makes them: EM over a channel with a few strong, one-way
    confusions, so substitution is asymmetric and insertion differs from deletion."""
    rng = random.Random(9)
    number = {phone: i for i, phone in enumerate(PHONES)}
    swaps = {"T": "D", "M": "N", "IY": "IH", "S": "Z"}
    pairs = []
    for _ in range(200):
        said = [number[p] for p in rng.choices(PHONES, k=rng.randint(2, 6))]
        heard = [number[swaps[PHONES[s]]] if PHONES[s] in swaps and rng.random() < 0.4 else s
                 for s in said if rng.random() > 0.05]
        pairs.append(PhonePair(tuple(said), tuple(heard + ([number["AH"]] if rng.random() < 0.2 else []))))
    fit = fit_channel(pairs, prior=CostModel.features(), prior_weight=5.0, iterations=3, scale=8.0)
    return to_costs(fit.channel, fit.scale)


LEARNED = learned_model()


def test_the_learned_model_is_what_the_kernels_must_handle() -> None:
    # Guards the next test's point: the learned costs are one-way, unlike the hand ones.
    assert LEARNED.substitution != tuple(zip(*LEARNED.substitution))
    assert LEARNED.insertion != LEARNED.deletion


@pytest.mark.parametrize("model", [CostModel.features(), CostModel.unit(), LEARNED], ids=["features", "unit", "learned"])
def test_alignment_costs_are_the_same_bits(model: CostModel) -> None:
    rng = random.Random(21)
    # Empty strings, one-phone strings and long spans (a run of words) all occur in practice.
    a = [random_phones(rng, 0, 40) for _ in range(3000)] + ["", "", encode(["K"])]
    b = [random_phones(rng, 0, 40) for _ in range(3000)] + ["", encode(["AH", "T"]), ""]
    compiled_costs = _batch_alignment_cost_compiled(a, b, model)
    numpy_costs = _batch_alignment_cost_numpy(a, b, model)
    assert same_bits(compiled_costs, numpy_costs)
    assert (compiled_costs > 0).any()


def test_compiled_unit_cost_equals_jiwer() -> None:
    # Source: jiwer (reference WER library): with unit costs the alignment cost is the number of
    # substitutions, deletions and insertions of its minimum-edit alignment.
    rng = random.Random(4)
    pairs = [(" ".join(rng.choices(PHONES, k=rng.randint(1, 12))), " ".join(rng.choices(PHONES, k=rng.randint(1, 12))))
             for _ in range(200)]
    costs = _batch_alignment_cost_compiled([encode(a.split()) for a, _ in pairs], [encode(b.split()) for _, b in pairs],
                                           CostModel.unit())
    for (a, b), cost in zip(pairs, costs.tolist()):
        out = jiwer.process_words(a, b)
        assert cost == out.substitutions + out.deletions + out.insertions


def test_alignment_refuses_what_is_not_a_phone_string() -> None:
    with pytest.raises(ValueError, match="not an encoded phone"):
        _batch_alignment_cost_compiled(["abc"], [encode(["K"])], CostModel.features())
    with pytest.raises(ValueError, match="as many strings"):
        _batch_alignment_cost_compiled([encode(["K"])], [], CostModel.features())


@pytest.fixture(scope="module")
def index_and_queries() -> tuple[PhoneIndex, list[str]]:
    rng = random.Random(9)
    # A small phone inventory makes n-grams shared widely, so posting lists are long, some are
    # dropped as common, and many scores tie: the ranking's tie order is exercised too.
    items = [random_phones(rng, 1, 14, inventory=12) for _ in range(4000)]
    index = PhoneIndex(items, max_postings=60)
    queries = [random_phones(rng, 0, 30, inventory=12) for _ in range(300)] + items[:50] + [""]
    return index, queries


@pytest.mark.parametrize("k, min_score", [(3, 0.2), (8, 0.3), (50, 0.7), (1, 0.0), (5, 0.45), (20, 0.6)])
def test_search_gives_the_same_hits(index_and_queries: tuple[PhoneIndex, list[str]], k: int,
                                    min_score: float) -> None:
    index, queries = index_and_queries
    got = index._search_compiled(queries, k=k, min_score=min_score)
    want = index._search_numpy(queries, k=k, min_score=min_score)
    assert same_hits(got, want)
    if k > 1:
        assert len(got.query) > len(set(got.query.tolist()))  # several hits per query: the order counts
    assert not index.counts.any()  # the scratch counters are left zeroed for the next call


def test_search_keeps_a_score_equal_to_the_threshold_as_numpy_does() -> None:
    # Scores are float32 and numpy compares them with the threshold rounded to float32 too.
    # Five phones against the same five and one more share 7 of 9 + 11 n-grams: Dice 14/20,
    # whose float32 lies below 0.7 but equals float32(0.7), so both paths keep the pair.
    query = encode(["K", "AE", "T", "IH", "N"])
    items = [query + encode(["Z"]), encode(["S", "IY", "M"]), query + encode(["Z", "Z"])]
    index = PhoneIndex(items, max_postings=10_000)
    got = index._search_compiled([query], k=5, min_score=0.7)
    assert same_hits(got, index._search_numpy([query], k=5, min_score=0.7))
    assert got.item.tolist() == [0] and got.score[0] == np.float32(0.7)
    # The pair kept is the edge case: its score, as the index computed it, lies below 0.7.
    assert float(got.score[0]) < 0.7


def test_search_survives_pickling_and_empty_batches(index_and_queries: tuple[PhoneIndex, list[str]]) -> None:
    index, queries = index_and_queries
    loaded = pickle.loads(pickle.dumps(index))
    assert "counts" not in index.__getstate__()  # scratch is rebuilt on load, not stored
    assert same_hits(loaded._search_compiled(queries, k=3, min_score=0.2), index._search_numpy(queries, k=3, min_score=0.2))
    assert same_hits(index._search_compiled([], k=3, min_score=0.2), index._search_numpy([], k=3, min_score=0.2))


@pytest.mark.parametrize("recast, codes, symbols", [(broad, BROAD_CODES, len(BROAD_CLASSES)),
                                                    (skeleton, SKELETON_CODES, len(SKELETON_CLASSES))])
def test_search_through_a_recast_table_is_the_search_of_the_recast_strings(
        recast: Callable[[str], str], codes: npt.NDArray[np.int32], symbols: int,
        monkeypatch: pytest.MonkeyPatch) -> None:
    # The broad-class and skeleton indexes are searched with the span's phones and a table; the
    # same hits as searching the strings written in the smaller alphabet first, both paths.
    rng = random.Random(4)
    sources = [random_phones(rng, 1, 14) for _ in range(3000)]
    index = PhoneIndex([recast(p) for p in sources], max_postings=60, symbols=symbols)
    vowels_only = encode(["AA", "IY", "ER", "OW"])  # nothing left of it in the skeleton
    queries = [random_phones(rng, 0, 30) for _ in range(300)] + sources[:50] + [vowels_only, ""]
    for k, min_score in ((3, 0.2), (8, 0.45)):
        got = index._search_compiled(queries, k=k, min_score=min_score, codes=codes)
        assert same_hits(got, index._search_compiled([recast(q) for q in queries], k=k, min_score=min_score))
        assert same_hits(got, index.search(queries, k=k, min_score=min_score, recast=codes))
        assert same_hits(got, index._search_numpy([recast(q) for q in queries], k=k, min_score=min_score))
        with monkeypatch.context() as without_kernels:  # the numpy path reads the same table
            without_kernels.setattr(phone_index, "compiled", None)
            assert same_hits(got, index.search(queries, k=k, min_score=min_score, recast=codes))
        # most indexed strings find themselves (a short one's n-grams may all be too common to index)
        assert len(set(range(300, 350)) & set(got.query.tolist())) >= 40
    with pytest.raises(ValueError, match="not an encoded phone"):
        index._search_compiled([queries[0], "plain text"], k=3, min_score=0.2, codes=codes)
    with pytest.raises(ValueError, match="outside the alphabet"):
        index._search_compiled([queries[0]], k=3, min_score=0.2, codes=np.full(len(PHONES), symbols, np.int32))
    assert not index.counts.any()


def test_search_refuses_what_is_not_a_phone_string(index_and_queries: tuple[PhoneIndex, list[str]]) -> None:
    index, queries = index_and_queries
    with pytest.raises(ValueError, match="not an encoded phone"):
        index._search_compiled([queries[0], "plain text"], k=3, min_score=0.2)
    assert not index.counts.any()  # counts taken for the first query are cleared on the error


@pytest.mark.parametrize("longest", [1, 3, 8])
def test_word_spans_are_the_same(longest: int) -> None:
    rng = random.Random(longest)
    vocabulary = ["bay", "three", "tamsin", "okara", "pump", "the", "a", "it's"]
    for _ in range(50):
        token_lists = [rng.choices(vocabulary, k=rng.randint(0, 9)) for _ in range(rng.randint(0, 10))]
        sound_lists = [[random_phones(rng, 1, 5) for _ in tokens] for tokens in token_lists]
        got = Spans(*compiled.word_spans(token_lists, sound_lists, longest))
        expected = _word_spans_python(token_lists, sound_lists, longest)
        assert got == expected
        for words, phones, text, occurrences in zip(got.words, got.phones, got.texts, got.occurrences):
            number, start, end = occurrences[0]
            assert words == tuple(token_lists[number][start:end]) and text == " ".join(words)
            assert phones == "".join(sound_lists[number][start:end]) and 1 <= end - start <= longest


def test_word_spans_refuse_mismatched_input() -> None:
    with pytest.raises(ValueError, match="differ in length"):
        compiled.word_spans([["a", "b"]], [["x"]], 2)
    with pytest.raises(ValueError, match="differ in length"):
        compiled.word_spans([["a"]], [], 2)
    with pytest.raises(TypeError, match="must be str"):
        compiled.word_spans([["a", 3]], [["x", "y"]], 2)
    with pytest.raises(ValueError, match="at least 1"):
        compiled.word_spans([["a"]], [["x"]], 0)


# ---- pair scoring (pair_screen, pair_finish) against score_spans's array path and rapidfuzz ----

def _pair_fixture() -> tuple[CompiledLexicon, list[Spans]]:
    rng = random.Random(21)
    pronouncer = Pronouncer()
    words = ["tamsin", "okara", "band", "saw", "bay", "three", "the", "for", "mezzanine", "reflow", "oven", "kiln",
             "siobhan", "virtanen", "lock", "call", "ember", "a", "st", "ellis"]
    names = sorted({" ".join(rng.sample(words, rng.randint(1, 3))) for _ in range(120)})
    entries = [LexiconEntry(f"e{i}", "thing", name, (name.split()[0],) if " " in name else (), None, 1.0, i + 2)
               for i, name in enumerate(names)]
    lexicon = compile_entries(entries, pronouncer, max_postings=60)
    messages = []
    for _ in range(30):
        nbest = []
        for rank in range(5):
            tokens = [rng.choice(words) if rng.random() < 0.7 else rng.choice(words)[:-1] + rng.choice("aeiou")
                      for _ in range(rng.randint(1, 7))]
            nbest.append(Hypothesis(" ".join(tokens), rank, {}, tokens=tokens, posterior=1.0 / (rank + 2)))
        messages.append(find_spans(nbest, lexicon.max_words + 1, pronouncer))
    return lexicon, messages


@pytest.mark.parametrize("weights", [
    Weights.of(MatchSettings()),  # the stage's defaults
    Weights(0.5, 0.3, 0.2, 8, 0.1, 0.2, 0.3, 0.2),  # looser: more pairs reach every term
    Weights(0.7, 0.0, 0.3, 5, 0.1, 0.3, 0.4, 0.3),  # no spelling term
    Weights(0.7, 0.3, 0.0, 5, 0.1, 0.3, 0.4, 0.3),  # no key term
])
def test_compiled_pair_scoring_gives_the_array_paths_pairs_bit_for_bit(monkeypatch: pytest.MonkeyPatch,
                                                                       weights: Weights) -> None:
    lexicon, messages = _pair_fixture()
    costs = CostModel.features()
    compiled_pairs = [score_spans(spans, lexicon, weights, costs) for spans in messages]
    monkeypatch.setattr(match, "compiled", None)
    array_pairs = [score_spans(spans, lexicon, weights, costs) for spans in messages]
    assert sum(len(p) for p in compiled_pairs) > 100
    for got, expected in zip(compiled_pairs, array_pairs):
        assert [(q, f, x.hex(), e) for q, f, x, e in got] == [(q, f, x.hex(), e) for q, f, x, e in expected]


def test_pair_terms_are_rapidfuzz_s_similarities_to_the_bit() -> None:
    rng = random.Random(5)
    alphabet = "ab cdé\u0101\u0102 "
    texts = ["", " ", "a", "ab c", "x" * 30, "ab" * 40, "b" * 64, "a" * 65] + [  # past 64: the row-by-row path
        "".join(rng.choices(alphabet, k=rng.randint(0, 12) if n % 10 else rng.randint(50, 140))) for n in range(300)]
    keys = [("",), ("A",), ("AB", "AP"), ("KLM",), ("TMSN", "TMSM"), ("K" * 70, "KL" * 40), ("P" * 64,),
            ("S" * 100,)] + [
        tuple("".join(rng.choices("ABKLMNPST", k=rng.randint(0, 6))) for _ in range(rng.randint(1, 2)))
        for _ in range(300)]

    class _Form:
        def __init__(self, text: str, keys: tuple[str, ...]) -> None:
            self.text, self.keys, self.phones = text, keys, ""

    count = 400
    queries = np.array([rng.randrange(len(texts)) for _ in range(count)], dtype=np.int32)
    items = np.array([rng.randrange(len(texts)) for _ in range(count)], dtype=np.int32)
    forms = [_Form(texts[i], keys[i]) for i in range(len(texts))]
    span_keys: list[tuple[str, ...] | None] = [keys[i] for i in range(len(texts))]
    scores = np.array([rng.random() for _ in range(count)], dtype=np.float64)
    pairs: list[tuple[int, int, float, bool]] = []
    compiled.pair_finish(texts, span_keys, forms, queries, items, scores, count, 0.3, 0.2, -1.0, 1.0, pairs)
    spelling = cpdist([texts[q].replace(" ", "") for q in queries.tolist()],
                      [texts[f].replace(" ", "") for f in items.tolist()], scorer=ratio, dtype=np.float64)
    first = [keys[q][0] for q in queries.tolist()]
    last = [keys[q][-1] for q in queries.tolist()]
    their_first = [keys[f][0] for f in items.tolist()]
    their_last = [keys[f][-1] for f in items.tolist()]
    agreement = cpdist(first + first + last + last, their_first + their_last + their_first + their_last,
                       scorer=Levenshtein.normalized_similarity, dtype=np.float64).reshape(4, count).max(axis=0)
    expected = (scores + 0.3 * spelling / 100.0) + 0.2 * agreement
    assert [p[2].hex() for p in pairs] == [(value / 1.0).hex() for value in expected.tolist()]


# ---- pooling (pool_pairs) against match._pool_python ----

def _shown(evidence: dict[int, Evidence]) -> list[tuple[object, ...]]:
    """Everything pooling decides, in order, floats as their bits and with each field's type."""
    return [(key, e.entry, e.pooled.hex(), type(e.pooled).__name__,
             [(h, s.score.hex(), s.start, s.end, s.form, s.exact, type(s.exact).__name__)
              for h, s in e.per_hypothesis.items()]) for key, e in evidence.items()]


def test_pooling_gives_the_python_versions_evidence_bit_for_bit() -> None:
    lexicon, messages = _pair_fixture()
    costs = CostModel.features()
    weights = Weights(0.6, 0.2, 0.2, 3, 0.2, 0.45, 0.6, 0.4, broad_candidates=4)
    rng = random.Random(17)
    scores = [0.5, 0.75, 0.8, 0.9, 1.0]  # repeated values, so ties between spans decide often
    compared = replaced = 0
    for spans in messages:
        hypotheses = 1 + max(h for places in spans.occurrences for h, _, _ in places)
        # Posteriors of very different sizes: the pooled sum's order and rounding then show.
        posteriors = [rng.random() * 10.0 ** -rng.randint(0, 12) for _ in range(hypotheses)]
        scored = score_spans(spans, lexicon, weights, costs)
        # Random pairs as well, exact ones among them, on forms of one, two and three words of the
        # same entries: every branch of the choice between two sightings (match._better) is taken.
        made = [(rng.randrange(len(spans)), rng.randrange(len(lexicon.forms)),
                 rng.choice(scores) if rng.random() < 0.7 else rng.random(), rng.random() < 0.3)
                for _ in range(rng.randint(0, 150))]
        for pairs in (scored, made, scored + made, []):
            for strong in (0.75, 0.0, 1.1):
                got = pool(spans, pairs, lexicon, posteriors, strong=strong)
                expected = _pool_python(spans, pairs, lexicon, posteriors, strong=strong)
                assert _shown(got) == _shown(expected)
                compared += len(expected)
                replaced += sum(1 for q, _, _, _ in pairs for _ in spans.occurrences[q]) > sum(
                    len(e.per_hypothesis) for e in expected.values())
    assert compared > 2000 and replaced > 100  # many entries, and sightings that met a held one


def test_pooling_a_worked_example() -> None:
    # Worked by hand: two hypotheses, posteriors 0.75 and 0.25; the entry's full form has two words
    # (form "a b"), its alias one (form "a"). Hypothesis 0 holds the alias exactly (score 1) at
    # words 0-1 and the full form nearly (0.8 >= strong 0.75) at 0-2, which contains it: the longer
    # form wins despite the lower score. Hypothesis 1 holds only the alias, exactly.
    # pooled = 0.75 x 0.8 + 0.25 x 1.0 = 0.85 (as Python's sum adds these two floats).
    lexicon = compile_entries([LexiconEntry("e0", "thing", "a b", ("a",), None, 1.0, 2)], Pronouncer())
    full = next(i for i, f in enumerate(lexicon.forms) if f.text == "a b")
    alias = next(i for i, f in enumerate(lexicon.forms) if f.text == "a")
    spans = Spans([("a",), ("a", "b")], ["", ""], ["a", "a b"], [[(0, 0, 1), (1, 3, 4)], [(0, 0, 2)]])
    for pairs in ([(0, alias, 1.0, True), (1, full, 0.8, False)], [(1, full, 0.8, False), (0, alias, 1.0, True)]):
        evidence = compiled.pool_pairs(spans.occurrences, pairs, lexicon.forms, [0.75, 0.25], 0.75, Evidence, Sighting)
        assert list(evidence) == [0]
        assert evidence[0].per_hypothesis == {0: Sighting(0.8, 0, 2, full, False), 1: Sighting(1.0, 3, 4, alias, True)}
        assert evidence[0].pooled == sum([0.75 * 0.8, 0.25 * 1.0])
    # Below strong the exact alias keeps hypothesis 0: 0.75 x 1.0 + 0.25 x 1.0 = 1.0.
    evidence = compiled.pool_pairs(spans.occurrences, [(0, alias, 1.0, True), (1, full, 0.7, False)],
                                   lexicon.forms, [0.75, 0.25], 0.75, Evidence, Sighting)
    assert evidence[0].per_hypothesis[0] == Sighting(1.0, 0, 1, alias, True) and evidence[0].pooled == 1.0


def test_pooling_refuses_what_it_cannot_read() -> None:
    lexicon, messages = _pair_fixture()
    spans = messages[0]
    with pytest.raises(IndexError, match="out of range"):
        compiled.pool_pairs(spans.occurrences, [(len(spans), 0, 0.5, False)], lexicon.forms, [1.0] * 5, 0.75,
                            Evidence, Sighting)
    with pytest.raises(IndexError, match="outside the posteriors"):
        compiled.pool_pairs(spans.occurrences, [(0, 0, 0.5, False)], lexicon.forms, [], 0.75, Evidence, Sighting)
    with pytest.raises(TypeError, match="must be a tuple"):
        compiled.pool_pairs(spans.occurrences, [(0, 0, 0.5)], lexicon.forms, [1.0] * 5, 0.75, Evidence, Sighting)


def test_merging_hits_keeps_the_first_search_s_pairs_then_the_new_ones_in_order() -> None:
    # Worked by hand: (0, 5) and (2, 7) are both found first; the second search's (0, 5) repeats
    # a first pair and is dropped, (0, 6) and (1, 5) are new, its own repeat (1, 5) stays (the
    # Python version checks against the first search's pairs only), and (2, 7) is dropped.
    query, item = np.array([0, 0, 2], np.int32), np.array([5, 9, 7], np.int32)
    more_query, more_item = np.array([0, 0, 1, 1, 2], np.int32), np.array([5, 6, 5, 5, 7], np.int32)
    out_query, out_item = np.empty(8, np.int32), np.empty(8, np.int32)
    found = compiled.merge_hits(query, item, more_query, more_item, out_query, out_item)
    assert list(zip(out_query[:found].tolist(), out_item[:found].tolist())) == [
        (0, 5), (0, 9), (2, 7), (0, 6), (1, 5), (1, 5)]
    with pytest.raises(ValueError, match="out_query"):
        compiled.merge_hits(query, item, more_query, more_item, out_query[:7], out_item)

"""The phone n-gram index: Dice scores checked by hand, and agreement with a brute-force scan."""

from __future__ import annotations

import random

import numpy as np
import pytest

from stages.lexicon.sound.phone_index import PhoneIndex, _unique, gram_codes, ngrams
from stages.lexicon.sound.phonetics import PHONES, encode


def dice(a: str, b: str) -> float:
    x, y = ngrams(a), ngrams(b)
    return 2 * len(x & y) / (len(x) + len(y))


def test_ngrams_of_a_short_string_worked_by_hand() -> None:
    s = encode(["K", "ER", "F"])
    # padded: ^ K ER F $ -> trigrams ^K ER, K ER F, ER F $; 4-grams ^K ER F, K ER F $
    assert len(ngrams(s)) == 5


def test_vectorised_ngrams_match_the_reference() -> None:
    rng = random.Random(2)
    strings = [encode(rng.choices(PHONES, k=rng.randint(0, 9))) for _ in range(100)]
    owner, gram = gram_codes(strings)
    for number, text in enumerate(strings):
        assert set(gram[owner == number].tolist()) == ngrams(text)


def test_search_matches_a_brute_force_scan() -> None:
    rng = random.Random(5)
    items = [encode(rng.choices(PHONES[:12], k=rng.randint(2, 9))) for _ in range(300)]
    index = PhoneIndex(items, max_postings=10_000)
    queries = [encode(rng.choices(PHONES[:12], k=rng.randint(2, 9))) for _ in range(40)]
    hits = index.search(queries, k=3, min_score=0.3)
    for q, query in enumerate(queries):
        got = [(int(i), float(s)) for qq, i, s in zip(hits.query, hits.item, hits.score) if qq == q]
        brute = sorted(((i, dice(query, item)) for i, item in enumerate(items)), key=lambda p: -p[1])
        brute = [p for p in brute if p[1] >= 0.3][:3]
        assert [s for _, s in got] == pytest.approx([s for _, s in brute], abs=1e-6)


def test_common_ngrams_are_dropped_from_the_vectors() -> None:
    shared = encode(["S", "T"])
    items = [shared + encode([p]) for p in PHONES[:30]]
    index = PhoneIndex(items, max_postings=5)
    # "^ S T" is held by all 30 items: dropped, so only item-specific grams count.
    hits = index.search([items[3]], k=1, min_score=0.1)
    assert list(hits.item) == [3] and hits.score[0] == pytest.approx(1.0)


def test_sort_based_unique_matches_numpy() -> None:
    rng = np.random.default_rng(3)
    for values in (np.zeros(0, np.int64), rng.integers(0, 50, 1000), rng.integers(0, 2**40, 300)):
        got, counts = _unique(values)
        want, want_counts = np.unique(values, return_counts=True)
        assert got.tolist() == want.tolist() and counts.tolist() == want_counts.tolist()


@pytest.mark.parametrize("min_score", [0.05, 0.2, 0.5])
def test_search_bound_keeps_every_pair_over_the_threshold(min_score: float) -> None:
    # Short and long items together make the least set size far from most: the bound that
    # skips scoring must still keep every pair a brute-force scan finds.
    rng = random.Random(8)
    items = [encode(rng.choices(PHONES[:10], k=rng.choice((1, 2, 12, 20)))) for _ in range(200)]
    index = PhoneIndex(items, max_postings=10_000)
    queries = [encode(rng.choices(PHONES[:10], k=rng.randint(1, 16))) for _ in range(30)]
    hits = index.search(queries, k=1000, min_score=min_score)
    for q, query in enumerate(queries):
        got = sorted(int(i) for qq, i in zip(hits.query, hits.item) if qq == q)
        brute = sorted(i for i, item in enumerate(items) if dice(query, item) >= min_score + 1e-6)
        assert set(brute) <= set(got)


def test_a_small_alphabet_finds_what_the_phone_alphabet_finds() -> None:
    # The broad-class and skeleton indexes write their symbols in alphabets of their own (17 and
    # 14 symbols); numbering the same strings either way must give the same hits, with a lookup
    # table a fraction of the size. Strings over the first 12 phones are written both ways.
    rng = random.Random(9)
    items = [rng.choices(range(12), k=rng.randint(2, 9)) for _ in range(300)]
    queries = [rng.choices(range(12), k=rng.randint(1, 9)) for _ in range(60)]
    as_phones = lambda codes: encode([PHONES[c] for c in codes])  # noqa: E731
    as_small = lambda codes: "".join(chr(0x100 + c) for c in codes)  # noqa: E731
    wide = PhoneIndex([as_phones(i) for i in items], max_postings=20)
    small = PhoneIndex([as_small(i) for i in items], max_postings=20, symbols=12)
    assert small.lookup.size < wide.lookup.size / 8
    a = wide.search([as_phones(q) for q in queries], k=4, min_score=0.2)
    b = small.search([as_small(q) for q in queries], k=4, min_score=0.2)
    assert (a.query.tolist(), a.item.tolist(), a.score.tolist()) == (b.query.tolist(), b.item.tolist(), b.score.tolist())
    owner, gram = gram_codes([as_small(i) for i in items[:20]], 12)
    for number, codes in enumerate(items[:20]):
        assert set(gram[owner == number].tolist()) == ngrams(as_small(codes), 12)


def test_only_kept_ngrams_have_posting_lists() -> None:
    shared = encode(["S", "T"])
    items = [shared + encode([p]) for p in PHONES[:30]]
    index = PhoneIndex(items, max_postings=5)
    # Every n-gram with "^ S T" is held by all 30 items and dropped: no postings are kept for it.
    kept = int((index.column_of >= 0).sum())
    assert len(index.offsets) == kept + 1 and len(index.postings) == int(index.offsets[-1])
    assert len(index.postings) < 30 * len(ngrams(items[0]))

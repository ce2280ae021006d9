"""Nearest-neighbour retrieval of phone strings by shared phone n-grams.

Each indexed string becomes the set of its phone 3- and 4-grams, padded at both ends so the first
and last phones count. An inverted index (CSR arrays: n-gram -> sorted string ids) answers a
whole batch of query spans at once: the postings of every query n-gram are gathered in one
array, shared n-grams counted with a single sort, and each pair scored by the Dice
coefficient 2|A & B| / (|A| + |B|) of the two n-gram sets. N-grams held by more than
``max_postings`` strings are left out of the vectors altogether, like stop words in text
retrieval: they say little and cost most. The limit is a fixed count, not a share, so the
work per query stays bounded as the lexicon grows.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import chain
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

__all__ = ["Hits", "PhoneIndex", "ngrams"]

_START, _END = "\x01", "\x02"
SIZES = (3, 4)


def ngrams(phones: str) -> set[str]:
    """Padded phone 3- and 4-grams; 4-grams stay rare enough to index in large lexicons."""
    padded = _START + phones + _END
    grams = {padded[i : i + n] for n in SIZES for i in range(len(padded) - n + 1)}
    return grams or {padded}


@dataclass(frozen=True, slots=True)
class Hits:
    """Candidates for a batch of queries: parallel arrays, grouped by query, best first."""

    query: npt.NDArray[np.int32]
    item: npt.NDArray[np.int32]
    score: npt.NDArray[np.float32]


class PhoneIndex:
    def __init__(self, strings: Sequence[str], *, max_postings: int = 400) -> None:
        vocabulary: dict[str, int] = {}
        rows: list[int] = []
        cols: list[int] = []
        sizes = np.zeros(len(strings), dtype=np.float32)
        for item, phones in enumerate(strings):
            grams = ngrams(phones)
            sizes[item] = len(grams)
            for gram in grams:
                rows.append(vocabulary.setdefault(gram, len(vocabulary)))
                cols.append(item)
        order = np.lexsort((np.asarray(cols, dtype=np.int32), np.asarray(rows, dtype=np.int32)))
        gram_of = np.asarray(rows, dtype=np.int32)[order]
        self.postings = np.asarray(cols, dtype=np.int32)[order]
        self.offsets = np.searchsorted(gram_of, np.arange(len(vocabulary) + 1)).astype(np.int64)
        lengths = np.diff(self.offsets)
        common = lengths > max_postings
        self.vocabulary = {g: i for g, i in vocabulary.items() if not common[i]}
        self.common = frozenset(g for g, i in vocabulary.items() if common[i])
        # Each string's set size counts only the n-grams kept in the vectors.
        dropped = np.zeros(len(strings), dtype=np.float32)
        np.add.at(dropped, self.postings[np.repeat(common, lengths)], 1.0)
        self.sizes = sizes - dropped
        self.count = len(strings)
        self._cache: dict[str, tuple[list[int], int]] = {}  # query phones -> n-gram ids, set size

    def _gram_ids(self, phones: str) -> tuple[list[int], int]:
        """The query's indexed n-gram ids, and its set size without the dropped common n-grams."""
        found = self._cache.get(phones)
        if found is None:
            vocabulary = self.vocabulary
            grams = ngrams(phones) - self.common
            found = ([vocabulary[g] for g in grams if g in vocabulary], len(grams))
            if len(self._cache) >= 100_000:  # bounded: recogniser output repeats, but not forever
                self._cache.clear()
            self._cache[phones] = found
        return found

    def __getstate__(self) -> dict[str, object]:
        return {k: v for k, v in self.__dict__.items() if k != "_cache"}

    def __setstate__(self, state: dict[str, object]) -> None:
        self.__dict__.update(state)
        self._cache = {}

    def search(self, queries: Sequence[str], *, k: int = 8, min_score: float = 0.3) -> Hits:
        """Up to ``k`` items per query with Dice score >= ``min_score``."""
        empty = Hits(np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.float32))
        looked_up = [self._gram_ids(phones) for phones in queries]
        per_query = [ids for ids, _ in looked_up]
        counts = np.fromiter(map(len, per_query), dtype=np.int64, count=len(per_query))
        total_grams = int(counts.sum())
        if total_grams == 0:
            return empty
        query_sizes = np.fromiter((size for _, size in looked_up), dtype=np.float32, count=len(looked_up))
        grams = np.fromiter(chain.from_iterable(per_query), dtype=np.int64, count=total_grams)
        owner = np.repeat(np.arange(len(per_query), dtype=np.int64), counts)
        starts = self.offsets[grams]
        lengths = self.offsets[grams + 1] - starts
        total = int(lengths.sum())
        if total == 0:
            return empty
        # Gather every posting list in one go: position = start of its list + rank within it.
        first = np.cumsum(lengths) - lengths
        positions = np.repeat(starts - first, lengths) + np.arange(total)
        keys = self.postings[positions] + np.repeat(owner * self.count, lengths)
        keys, shared = np.unique(keys, return_counts=True)
        query = (keys // self.count).astype(np.int32)
        item = (keys % self.count).astype(np.int32)
        score = (2.0 * shared / np.maximum(query_sizes[query] + self.sizes[item], 1.0)).astype(np.float32)
        keep = score >= min_score
        query, item, score = query[keep], item[keep], score[keep]
        if not len(score):
            return empty
        order = np.lexsort((-score, query))
        query, item, score = query[order], item[order], score[order]
        # Rank within each query group, to keep the first k of each.
        group_starts = np.flatnonzero(np.r_[True, query[1:] != query[:-1]])
        group_start = np.repeat(group_starts, np.diff(np.r_[group_starts, len(query)]))
        keep = (np.arange(len(query)) - group_start) < k
        return Hits(query[keep], item[keep], score[keep])

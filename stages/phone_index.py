"""Nearest-neighbour retrieval of phone strings by shared phone n-grams.

Each indexed string becomes the set of its phone trigrams, padded at both ends so the first
and last phones count. An inverted index (CSR arrays: n-gram -> sorted string ids) answers a
whole batch of query spans at once: the postings of every query n-gram are gathered in one
array, shared n-grams counted with a single sort, and each pair scored by the Dice
coefficient 2|A & B| / (|A| + |B|) of the two n-gram sets. N-grams held by more than
``max_df`` of the strings are skipped at query time (they say little and cost most), but
still count in the set sizes, so skipping them only lowers scores.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

__all__ = ["Hits", "PhoneIndex", "ngrams"]

_START, _END = "\x01", "\x02"
N = 3


def ngrams(phones: str) -> set[str]:
    padded = _START + phones + _END
    if len(padded) <= N:
        return {padded}
    return {padded[i : i + N] for i in range(len(padded) - N + 1)}


@dataclass(frozen=True, slots=True)
class Hits:
    """Candidates for a batch of queries: parallel arrays, grouped by query, best first."""

    query: npt.NDArray[np.int32]
    item: npt.NDArray[np.int32]
    score: npt.NDArray[np.float32]


class PhoneIndex:
    def __init__(self, strings: Sequence[str], *, max_df: float = 0.05) -> None:
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
        self.vocabulary = vocabulary
        self.sizes = sizes
        self.count = len(strings)
        # Never skip an n-gram in a small index: there every one of them is cheap.
        self.df_limit = max(int(max_df * len(strings)), 200)

    def search(self, queries: Sequence[str], *, k: int = 8, min_score: float = 0.3) -> Hits:
        """Up to ``k`` items per query with Dice score >= ``min_score``."""
        parts: list[npt.NDArray[np.int64]] = []
        query_sizes = np.zeros(len(queries), dtype=np.float32)
        offsets, postings, limit = self.offsets, self.postings, self.df_limit
        for number, phones in enumerate(queries):
            grams = ngrams(phones)
            query_sizes[number] = len(grams)
            base = number * self.count
            for gram in grams:
                gram_id = self.vocabulary.get(gram)
                if gram_id is None:
                    continue
                start, end = offsets[gram_id], offsets[gram_id + 1]
                if end - start > limit:
                    continue
                parts.append(postings[start:end] + base)
        empty = Hits(np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.float32))
        if not parts:
            return empty
        keys, shared = np.unique(np.concatenate(parts), return_counts=True)
        query = (keys // self.count).astype(np.int32)
        item = (keys % self.count).astype(np.int32)
        score = (2.0 * shared / (query_sizes[query] + self.sizes[item])).astype(np.float32)
        keep = score >= min_score
        query, item, score = query[keep], item[keep], score[keep]
        if not len(score):
            return empty
        order = np.lexsort((-score, query))
        query, item, score = query[order], item[order], score[order]
        # Rank within each query group, to keep the first k of each.
        starts = np.flatnonzero(np.r_[True, query[1:] != query[:-1]])
        group_start = np.repeat(starts, np.diff(np.r_[starts, len(query)]))
        keep = (np.arange(len(query)) - group_start) < k
        return Hits(query[keep], item[keep], score[keep])

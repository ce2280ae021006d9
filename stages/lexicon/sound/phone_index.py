"""Nearest-neighbour retrieval of phone strings by shared phone n-grams.

Each indexed string becomes the set of its phone 3- and 4-grams, padded at both ends so the
first and last phones count. An n-gram is a number (phones in base 41, with start and end
marks), so the n-grams of a whole batch of strings are computed with a few array operations
and mapped to index columns through a dense lookup table. An inverted index (CSR arrays:
n-gram -> sorted string ids) answers a whole batch of query spans at once: the postings of
every query n-gram are gathered in one array, shared n-grams counted with a single sort, and
each pair scored by the Dice coefficient 2|A & B| / (|A| + |B|) of the two n-gram sets. Where
the compiled kernels are built (stages/kernels.py) the same search runs in C instead: one
query at a time, shared n-grams counted in a dense per-item counter, the best k kept by
insertion; the results are the same to the bit.
N-grams held by more than ``max_postings`` strings are left out of the vectors altogether,
like stop words in text retrieval: they say little and cost most. The limit is a fixed count,
not a share, so the work per query stays bounded as the lexicon grows.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from stages.lexicon.sound.kernels import compiled
from stages.lexicon.sound.phonetics import PHONES

__all__ = ["Hits", "PhoneIndex", "gram_codes", "ngrams"]

_CHAR_BASE = 0x100  # as in stages.phonetics.encode
SIZES = (3, 4)
_UNKNOWN, _DROPPED = -1, -2


@dataclass(frozen=True, slots=True)
class _Alphabet:
    """How the n-grams of strings over ``symbols`` symbols are numbered: symbol codes, then a start
    and an end mark, in base ``symbols + 2``; 3-gram and 4-gram numbers in separate ranges. A
    smaller alphabet (the broad classes, the skeleton) needs a far smaller lookup table."""

    symbols: int

    @property
    def start(self) -> int:
        return self.symbols

    @property
    def end(self) -> int:
        return self.symbols + 1

    @property
    def base(self) -> int:
        return self.symbols + 2

    @property
    def offsets(self) -> dict[int, int]:
        return {3: 0, 4: self.base**3}

    @property
    def table(self) -> int:
        return self.base**3 + self.base**4


def ngrams(phones: str, symbols: int = len(PHONES)) -> set[int]:
    """The n-gram numbers of one encoded string (the reference for ``gram_codes``)."""
    alphabet = _Alphabet(symbols)
    padded = [alphabet.start] + [ord(ch) - _CHAR_BASE for ch in phones] + [alphabet.end]
    out = set()
    for n in SIZES:
        for i in range(len(padded) - n + 1):
            value = 0
            for code in padded[i : i + n]:
                value = value * alphabet.base + code
            out.add(alphabet.offsets[n] + value)
    return out


def _unique(values: npt.NDArray[Any]) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Sorted distinct values and their counts: ``np.unique(..., return_counts=True)`` by one sort
    (numpy's hash-based unique is several times slower on these large numbers)."""
    ordered = np.sort(values)
    if not len(ordered):
        return ordered, ordered
    first = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    return ordered[first], np.diff(np.r_[first, len(ordered)])


def gram_codes(strings: Sequence[str], symbols: int = len(PHONES)) -> tuple[npt.NDArray[np.int64],
                                                                             npt.NDArray[np.int64]]:
    """(string number, n-gram number) for every distinct n-gram of every string, vectorised."""
    alphabet = _Alphabet(symbols)
    base, offsets, table = alphabet.base, alphabet.offsets, alphabet.table
    lengths = np.fromiter(map(len, strings), dtype=np.int64, count=len(strings)) + 2
    joined = "".join(strings).encode("utf-32-le")
    inner = np.frombuffer(joined, dtype=np.uint32).astype(np.int64) - _CHAR_BASE
    owner = np.repeat(np.arange(len(strings), dtype=np.int64), lengths)
    codes = np.empty(int(lengths.sum()), dtype=np.int64)
    starts = np.cumsum(lengths) - lengths
    is_start = np.zeros(len(codes), dtype=bool)
    is_start[starts] = True
    is_end = np.zeros(len(codes), dtype=bool)
    is_end[starts + lengths - 1] = True
    codes[is_start] = alphabet.start
    codes[is_end] = alphabet.end
    codes[~(is_start | is_end)] = inner
    owners, grams = [], []
    for n in SIZES:
        if len(codes) < n:
            continue
        value = np.zeros(len(codes) - n + 1, dtype=np.int64)
        for k in range(n):
            value = value * base + codes[k : len(codes) - n + 1 + k]
        whole = owner[: len(value)] == owner[n - 1 :]  # the window lies inside one string
        owners.append(owner[: len(value)][whole])
        grams.append(value[whole] + offsets[n])
    if not owners:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    pairs, _ = _unique(np.concatenate(owners) * table + np.concatenate(grams))
    return pairs // table, pairs % table


@dataclass(frozen=True, slots=True)
class Hits:
    """Candidates for a batch of queries: parallel arrays, grouped by query, best first."""

    query: npt.NDArray[np.int32]
    item: npt.NDArray[np.int32]
    score: npt.NDArray[np.float32]


class PhoneIndex:
    def __init__(self, strings: Sequence[str], *, max_postings: int = 60, symbols: int = len(PHONES)) -> None:
        """An index of encoded strings over ``symbols`` symbols (the phones, or fewer classes)."""
        self.alphabet = _Alphabet(symbols)
        owner, gram = gram_codes(strings, symbols)
        vocabulary, column = np.unique(gram, return_inverse=True)
        counts = np.bincount(column, minlength=len(vocabulary))
        common = counts > max_postings
        # Only the kept n-grams have posting lists: a dropped one is never looked up, and at 100k
        # entries the dropped lists held most of the broad-class and skeleton indexes' postings.
        kept = ~common[column]
        renumbered = np.cumsum(~common) - 1
        order = np.lexsort((owner[kept], renumbered[column[kept]]))
        self.postings = owner[kept][order].astype(np.int32)
        self.offsets = np.concatenate([[0], np.cumsum(counts[~common])]).astype(np.int64)
        self.vocabulary = vocabulary
        self.column_of = np.where(common, _DROPPED, renumbered)
        # Each string's set size counts only the n-grams kept in the vectors.
        self.sizes = np.bincount(owner[kept], minlength=len(strings)).astype(np.float32)
        self.count = len(strings)
        self._build_lookup()

    def _build_lookup(self) -> None:
        lookup = np.full(self.alphabet.table, _UNKNOWN, dtype=np.int32)
        lookup[self.vocabulary] = self.column_of
        self.lookup = lookup
        self.least_size = float(self.sizes.min(initial=0.0))  # for the search's bound on scores
        # Scratch of the compiled search: shared n-grams per item (left zeroed) and the items touched.
        self.counts = np.zeros(self.count, dtype=np.int32)
        self.touched = np.zeros(self.count, dtype=np.int32)

    def __getstate__(self) -> dict[str, object]:
        rebuilt = ("lookup", "least_size", "counts", "touched")  # on load
        return {k: v for k, v in self.__dict__.items() if k not in rebuilt}

    def __setstate__(self, state: dict[str, object]) -> None:
        self.__dict__.update(state)
        self._build_lookup()

    def search(self, queries: Sequence[str], *, k: int = 8, min_score: float = 0.3,
               recast: npt.NDArray[np.int32] | None = None) -> Hits:
        """Up to ``k`` items per query with Dice score >= ``min_score``. With ``recast`` (each phone's
        symbol in the index's smaller alphabet, -1 where it is left out: see
        stages.lexicon.sound.phonetics.BROAD_CODES), the queries are phone strings read through it."""
        if compiled is not None:
            return self._search_compiled(queries, k=k, min_score=min_score, codes=recast)
        if recast is not None:
            table = _translation(np.ascontiguousarray(recast, dtype=np.int32).tobytes())
            queries = [q.translate(table) for q in queries]
        return self._search_numpy(queries, k=k, min_score=min_score)

    def _search_compiled(self, queries: Sequence[str], *, k: int, min_score: float,
                         codes: npt.NDArray[np.int32] | None = None) -> Hits:
        if compiled is None:
            raise RuntimeError("the compiled kernels are not built")
        query = np.empty(len(queries) * k, dtype=np.int32)
        item = np.empty(len(queries) * k, dtype=np.int32)
        score = np.empty(len(queries) * k, dtype=np.float32)
        found = compiled.search(queries, self.lookup, self.offsets, self.postings, self.sizes, self.counts,
                                self.touched, self.least_size, k, min_score, query, item, score,
                                _CHAR_BASE, self.alphabet.start, self.alphabet.base, self.alphabet.offsets[4],
                                None if codes is None else np.ascontiguousarray(codes, dtype=np.int32))
        return Hits(query[:found], item[:found], score[:found])

    def _search_numpy(self, queries: Sequence[str], *, k: int, min_score: float) -> Hits:
        empty = Hits(np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.float32))
        if not queries:
            return empty
        owner, gram = gram_codes(queries, self.alphabet.symbols)
        column = self.lookup[gram]
        kept = column != _DROPPED
        query_sizes = np.bincount(owner[kept], minlength=len(queries)).astype(np.float32)
        known = column >= 0
        owner, column = owner[known], column[known].astype(np.int64)
        starts = self.offsets[column]
        lengths = self.offsets[column + 1] - starts
        total = int(lengths.sum())
        if total == 0:
            return empty
        # Gather every posting list in one go: position = start of its list + rank within it.
        # A key is (query << shift) + item: sorting keys groups by query, then item, and the
        # parts come back with a shift and a mask; int32 keys when they fit sort faster.
        first = np.cumsum(lengths) - lengths
        positions = np.repeat(starts - first, lengths) + np.arange(total)
        shift = max(1, self.count.bit_length())
        wide = np.int32 if len(queries) << shift < 2**31 else np.int64
        keys = self.postings[positions].astype(wide) + np.repeat((owner << shift).astype(wide), lengths)
        keys, shared = _unique(keys)
        query = (keys >> shift).astype(np.int32)
        # Dice >= min_score needs 2 shared >= min_score (|A| + |B|) >= min_score (|A| + least |B|):
        # pairs below that bound (with a margin for rounding) cannot pass and are not scored.
        bound = min_score * (query_sizes + self.least_size) / 2.0 - 1e-3
        hopeful = shared >= bound[query]
        keys, shared, query = keys[hopeful], shared[hopeful], query[hopeful]
        item = (keys & ((1 << shift) - 1)).astype(np.int32)
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


@functools.lru_cache(maxsize=8)
def _translation(codes: bytes) -> dict[int, str | None]:
    """A recast table (int32 class numbers, -1 for a phone left out) as ``str.translate`` reads
    it; built once per table, not once per search."""
    return {_CHAR_BASE + phone: None if to < 0 else chr(_CHAR_BASE + to)
            for phone, to in enumerate(np.frombuffer(codes, dtype=np.int32).tolist())}

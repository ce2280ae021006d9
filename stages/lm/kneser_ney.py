"""Interpolated modified Kneser-Ney estimation (Chen and Goodman 1998, TR-10-98).

Conventions (chosen so a model agrees with the widely used on-disk estimator's output):

- a sentence is ``<s> w1 .. wm </s>``; every wi and ``</s>`` is predicted from at most
  order-1 preceding tokens, the history cut at ``<s>``; ``<s>`` is never predicted;
- the highest order keeps raw counts; lower orders use continuation counts (distinct left
  extensions, ``<s>`` counting as one), except n-grams beginning with ``<s>``, which have no
  left extension and keep raw counts; the ``<s>`` and ``<unk>`` unigrams count 0;
- three discounts per order from that order's count-of-counts (eq. 26 of the report);
- unigrams are interpolated with the uniform distribution over the vocabulary without ``<s>``.
"""

from __future__ import annotations

import math
import warnings
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

__all__ = [
    "BOS",
    "DEFAULT_FALLBACK",
    "EOS",
    "RESERVED",
    "UNK",
    "DiscountFallbackWarning",
    "Discounts",
    "KneserNeyModel",
    "count_ngrams",
    "estimate",
    "estimate_discounts",
]

BOS, EOS, UNK = "<s>", "</s>", "<unk>"
RESERVED = frozenset({BOS, EOS, UNK})
DEFAULT_FALLBACK = (0.5, 1.0, 1.5)

Ngram = tuple[str, ...]


class DiscountFallbackWarning(UserWarning):
    """Issued when an order's count-of-counts cannot give valid discounts."""


@dataclass(frozen=True, slots=True)
class Discounts:
    """D1, D2 and D3+ of one order, and whether they are the fallback values."""

    d1: float
    d2: float
    d3: float
    fallback: bool = False

    def of(self, count: int) -> float:
        if count <= 0:
            return 0.0
        return self.d1 if count == 1 else self.d2 if count == 2 else self.d3


def estimate_discounts(
    count_of_counts: Sequence[int],
    *,
    order: int,
    fallback: Sequence[float] = DEFAULT_FALLBACK,
) -> Discounts:
    """Discounts from n1..n4 (Chen and Goodman 1998, eq. 26); the fallback when they fail.

    Y = n1 / (n1 + 2 n2) and D_j = j - (j + 1) Y n_{j+1} / n_j for j = 1, 2, 3.
    """
    n1, n2, n3, n4 = (int(c) for c in count_of_counts[:4])
    reason = ""
    if min(n1, n2, n3) == 0:
        # n1..n3 divide; n4 only multiplies (n4 = 0 gives D3 = 3, still in range)
        reason = f"count-of-counts n1..n3 = {n1}, {n2}, {n3} include a zero"
    else:
        y = n1 / (n1 + 2 * n2)
        values = [j - (j + 1) * y * nxt / cur for j, cur, nxt in ((1, n1, n2), (2, n2, n3), (3, n3, n4))]
        bad = [f"D{j}={d:.4g}" for j, d in enumerate(values, start=1) if not 0 <= d <= j]
        if not bad:
            return Discounts(values[0], values[1], values[2])
        reason = f"{', '.join(bad)} outside [0, j] (n1..n4 = {n1}, {n2}, {n3}, {n4})"
    d1, d2, d3 = (float(v) for v in fallback)
    warnings.warn(
        f"order {order}: {reason}; using fallback discounts {d1:g}, {d2:g}, {d3:g}"
        " (the corpus is too small or too repetitive for estimated discounts)",
        DiscountFallbackWarning,
        stacklevel=3,
    )
    return Discounts(d1, d2, d3, fallback=True)


def count_ngrams(sentences: Iterable[Sequence[str]], order: int) -> list[Counter[Ngram]]:
    """Adjusted counts per order: index k-1 holds the k-grams.

    Sentences are token lists without ``<s>``/``</s>``; duplicates count every time.
    """
    if order < 1:
        raise ValueError(f"order must be at least 1, got {order}")
    top: Counter[Ngram] = Counter()
    starts: Counter[Ngram] = Counter()  # n-grams beginning with <s>, shorter than the order
    for tokens in sentences:
        padded = [BOS, *tokens, EOS]
        if order > 1:
            # zip of shifted views yields every full-length window in C, not a Python loop
            top.update(zip(*(padded[i:] for i in range(order))))
            for length in range(2, min(order - 1, len(padded)) + 1):
                starts[tuple(padded[:length])] += 1
        else:
            top.update((token,) for token in padded[1:])
    counts: list[Counter[Ngram]] = [Counter() for _ in range(order)]
    counts[order - 1] = top
    for k in range(order - 1, 0, -1):
        # A k-gram's continuation count is the number of distinct (k+1)-grams it ends.
        lower: Counter[Ngram] = Counter(gram[1:] for gram in counts[k])
        for gram, count in starts.items():
            if len(gram) == k:
                lower[gram] = count
        counts[k - 1] = lower
    unigrams = counts[0]
    if order > 1:
        # raw top-order unigrams already exclude <s>; continuation counts never produce it
        unigrams.pop((BOS,), None)
    unigrams[(BOS,)] = 0
    unigrams[(UNK,)] = 0
    if (EOS,) not in unigrams:
        unigrams[(EOS,)] = 0
    return counts


def _count_of_counts(counts: Counter[Ngram]) -> list[int]:
    n = [0, 0, 0, 0]
    for value in counts.values():
        if 1 <= value <= 4:
            n[value - 1] += 1
    return n


@dataclass(slots=True)
class _Context:
    total: int = 0
    n1: int = 0
    n2: int = 0
    n3: int = 0
    gamma: float = 0.0


def _context_stats(counts: Counter[Ngram], discounts: Discounts) -> dict[Ngram, _Context]:
    stats: dict[Ngram, _Context] = {}
    for gram, count in counts.items():
        if count <= 0:
            continue
        history = gram[:-1]
        ctx = stats.get(history)
        if ctx is None:
            ctx = stats[history] = _Context()
        ctx.total += count
        if count == 1:
            ctx.n1 += 1
        elif count == 2:
            ctx.n2 += 1
        else:
            ctx.n3 += 1
    for ctx in stats.values():
        ctx.gamma = (discounts.d1 * ctx.n1 + discounts.d2 * ctx.n2 + discounts.d3 * ctx.n3) / ctx.total
    return stats


@dataclass(slots=True)
class KneserNeyModel:
    """An estimated model: adjusted counts, discounts and interpolated probabilities.

    ``probs[k-1]`` maps each k-gram to its interpolated probability (linear, not log);
    ``backoffs[k-1]`` maps each k-gram that is a context to its interpolation weight g.
    """

    order: int
    counts: list[Counter[Ngram]]
    discounts: list[Discounts]
    vocab_size: int  # for the uniform share: the vocabulary without <s>
    contexts: list[dict[Ngram, _Context]] = field(repr=False)
    probs: list[dict[Ngram, float]] = field(repr=False)
    backoffs: list[dict[Ngram, float]] = field(repr=False)

    @property
    def vocabulary(self) -> list[str]:
        return [gram[0] for gram in self.counts[0]]

    def prob(self, word: str, history: Sequence[str] = ()) -> float:
        """p(word | history) straight from the interpolation formula, without the tables.

        The history is cut to the last order-1 tokens; an unknown word is ``<unk>``.
        """
        if (word,) not in self.counts[0]:
            word = UNK
        context = tuple(history)[-(self.order - 1):] if self.order > 1 else ()
        return self._interpolated(word, context)

    def _interpolated(self, word: str, context: Ngram) -> float:
        if not context:
            count = self.counts[0][(word,)] if word != BOS else 0
            root = self.contexts[0][()]
            discount = self.discounts[0].of(count)
            return (count - discount) / root.total + root.gamma / self.vocab_size
        lower = self._interpolated(word, context[1:])
        ctx = self.contexts[len(context)].get(context)
        if ctx is None:
            return lower
        count = self.counts[len(context)].get(context + (word,), 0)
        discount = self.discounts[len(context)].of(count)
        return (count - discount) / ctx.total + ctx.gamma * lower

    def sentence_log10(self, tokens: Sequence[str]) -> float:
        """log10 probability of ``<s> tokens </s>`` by the formula (what an ARPA reader gives)."""
        padded = [BOS, *tokens, EOS]
        total = 0.0
        for i in range(1, len(padded)):
            history = padded[max(0, i - self.order + 1):i]
            total += math.log10(self.prob(padded[i], history))
        return total


def estimate(
    sentences: Iterable[Sequence[str]],
    order: int,
    *,
    fallback: Sequence[float] = DEFAULT_FALLBACK,
) -> KneserNeyModel:
    """Count and estimate an interpolated modified Kneser-Ney model of the given order."""
    counts = count_ngrams(sentences, order)
    if sum(counts[0].values()) == 0:
        raise ValueError("no words to estimate from")
    discounts = [
        estimate_discounts(_count_of_counts(counts[k]), order=k + 1, fallback=fallback) for k in range(order)
    ]
    contexts = [_context_stats(counts[k], discounts[k]) for k in range(order)]
    vocab_size = len(counts[0]) - 1  # every unigram except <s>
    root = contexts[0][()]
    uniform = root.gamma / vocab_size
    d = discounts[0]
    probs: list[dict[Ngram, float]] = [
        {gram: (c - d.of(c)) / root.total + uniform for gram, c in counts[0].items() if gram != (BOS,)}
    ]
    for k in range(1, order):
        d = discounts[k]
        ctxs = contexts[k]
        lower_probs = probs[k - 1]
        level: dict[Ngram, float] = {}
        for gram, c in counts[k].items():
            ctx = ctxs[gram[:-1]]
            level[gram] = (c - d.of(c)) / ctx.total + ctx.gamma * lower_probs[gram[1:]]
        probs.append(level)
    backoffs = [
        {history: ctx.gamma for history, ctx in contexts[k + 1].items()} for k in range(order - 1)
    ] + [{}]
    return KneserNeyModel(order, counts, discounts, vocab_size, contexts, probs, backoffs)

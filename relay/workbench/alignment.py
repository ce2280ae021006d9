"""Word alignment with a backtrace: which hypothesis words stand for which reference words."""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["align", "aligned_span"]

Pair = tuple[int | None, int | None]  # (reference index, hypothesis index); None on one side = gap


def align(reference: Sequence[str], hypothesis: Sequence[str]) -> list[Pair]:
    """A minimum-edit (Levenshtein) alignment; ties prefer substitution, then deletion."""
    rows, cols = len(reference) + 1, len(hypothesis) + 1
    cost = [[0] * cols for _ in range(rows)]
    for i in range(rows):
        cost[i][0] = i
    for j in range(cols):
        cost[0][j] = j
    for i in range(1, rows):
        for j in range(1, cols):
            cost[i][j] = min(
                cost[i - 1][j - 1] + (reference[i - 1] != hypothesis[j - 1]),
                cost[i - 1][j] + 1,
                cost[i][j - 1] + 1,
            )
    pairs: list[Pair] = []
    i, j = rows - 1, cols - 1
    while i > 0 or j > 0:
        if i > 0 and j > 0 and cost[i][j] == cost[i - 1][j - 1] + (reference[i - 1] != hypothesis[j - 1]):
            pairs.append((i - 1, j - 1))
            i, j = i - 1, j - 1
        elif i > 0 and cost[i][j] == cost[i - 1][j] + 1:
            pairs.append((i - 1, None))
            i -= 1
        else:
            pairs.append((None, j - 1))
            j -= 1
    pairs.reverse()
    return pairs


def aligned_span(pairs: Sequence[Pair], start: int, end: int) -> tuple[int, int] | None:
    """The hypothesis words [a, b) standing for reference words [start, end); None when the
    whole span was deleted.

    Inserted words next to the span count as part of it: a misheard term is where the
    recogniser splits one word into several, so the extra words belong to the term rather
    than to its correctly heard neighbours.
    """
    positions = [k for k, (ref, _) in enumerate(pairs) if ref is not None and start <= ref < end]
    if not positions:
        return None
    first, last = positions[0], positions[-1]
    while first > 0 and pairs[first - 1][0] is None:
        first -= 1
    while last + 1 < len(pairs) and pairs[last + 1][0] is None:
        last += 1
    inside = [hyp for _, hyp in pairs[first:last + 1] if hyp is not None]
    if not inside:
        return None
    return min(inside), max(inside) + 1

"""Word alignment with a backtrace: which hypothesis words stand for which reference words."""

from __future__ import annotations

from collections.abc import Sequence

from rapidfuzz.distance import Levenshtein

__all__ = ["align", "aligned_span"]

Pair = tuple[int | None, int | None]  # (reference index, hypothesis index); None on one side = gap


def align(reference: Sequence[str], hypothesis: Sequence[str]) -> list[Pair]:
    """A minimum-edit (Levenshtein) alignment of two word lists, from rapidfuzz's opcodes."""
    pairs: list[Pair] = []
    for op in Levenshtein.opcodes(list(reference), list(hypothesis)):
        refs = range(op.src_start, op.src_end)
        hyps = range(op.dest_start, op.dest_end)
        if op.tag in ("equal", "replace"):
            pairs += list(zip(refs, hyps))
        elif op.tag == "delete":
            pairs += [(r, None) for r in refs]
        else:
            pairs += [(None, h) for h in hyps]
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

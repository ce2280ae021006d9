"""Carrying a span from one hypothesis into another, and rewriting token runs with spans kept."""

from __future__ import annotations

from collections.abc import Sequence
from difflib import SequenceMatcher
from functools import lru_cache

from rapidfuzz.distance import Levenshtein

__all__ = ["map_span", "mapped_span", "rewrite", "runs_of", "word_alignment"]


def map_span(origin: Sequence[str], target: Sequence[str], start: int, end: int) -> tuple[int, int]:
    """The word range of ``target`` that lines up with ``origin[start:end]``.

    Words are aligned with difflib's matcher; a boundary inside a changed block goes to the
    block's edge, so the whole differing stretch is replaced.
    """
    if list(origin) == list(target):
        return start, end
    return mapped_span(_opcodes(tuple(origin), tuple(target)), len(origin), len(target), start, end)


def word_alignment(origin: Sequence[str], target: Sequence[str]) -> tuple[tuple[str, int, int, int, int], ...]:
    """A minimum-edit alignment of two word sequences (rapidfuzz, in C) as opcodes, for
    ``mapped_span``: a tenth of the cost of difflib's matcher, for callers that map many spans."""
    return tuple((op.tag, op.src_start, op.src_end, op.dest_start, op.dest_end)
                 for op in Levenshtein.opcodes(origin, target))


def mapped_span(opcodes: Sequence[tuple[str, int, int, int, int]], origin: int, target: int,
                start: int, end: int) -> tuple[int, int]:
    """The word range of a ``target`` sequence of that many words that lines up with ``start:end``
    of an ``origin`` sequence, by their ``opcodes``; a boundary inside a changed block goes to the
    block's edge (``map_span``'s rules)."""
    mapped_start, mapped_end = target, target
    for tag, i1, i2, j1, _j2 in opcodes:
        if i1 <= start < i2 or (start == i2 == origin):
            mapped_start = j1 + (start - i1) if tag == "equal" else j1
            break
    for tag, i1, i2, j1, j2 in opcodes:
        if i1 < end <= i2 or (end == i1 == 0):
            mapped_end = j1 + (end - i1) if tag == "equal" else j2
            break
    mapped_end = max(mapped_end, mapped_start)
    return mapped_start, mapped_end


def runs_of(words: Sequence[str], tokens: Sequence[str]) -> list[int]:
    """Where ``tokens`` hold ``words`` one after another: the start of each such run."""
    size = len(words)
    # Tokens hold no spaces: the run stands in them exactly when its words, space-delimited, are
    # a substring of theirs (one C search before any slicing).
    if not size or " " + " ".join(words) + " " not in " " + " ".join(tokens) + " ":
        return []
    return [i for i in range(len(tokens) - size + 1) if list(tokens[i:i + size]) == list(words)]


@lru_cache(maxsize=256)
def _opcodes(origin: tuple[str, ...], target: tuple[str, ...]) -> tuple[tuple[str, int, int, int, int], ...]:
    # Several entries of one message are often carried over from the same hypothesis.
    return tuple(SequenceMatcher(None, origin, target, autojunk=False).get_opcodes())


def rewrite(tokens: Sequence[str], replacements: Sequence[tuple[int, int, str]]
            ) -> tuple[str, list[tuple[int, int]]]:
    """Text with each (start, end, words) replacement made, and each one's character span.

    Replacements must not overlap; spans come back in the order the replacements were given.
    """
    order = sorted(range(len(replacements)), key=lambda i: replacements[i][0])
    pieces: list[str] = []
    spans: list[tuple[int, int]] = [(0, 0)] * len(replacements)
    position = 0
    length = 0

    def add(text: str) -> tuple[int, int]:
        nonlocal length
        if not text:
            return length, length
        if pieces:
            length += 1  # the joining space
        begin = length
        pieces.append(text)
        length += len(text)
        return begin, length

    for number in order:
        start, end, words = replacements[number]
        for token in tokens[position:start]:
            add(token)
        spans[number] = add(words)
        position = max(position, end)
    for token in tokens[position:]:
        add(token)
    return " ".join(pieces), spans

"""How far a finished text is from the nearest in-domain line, in word edits.

The NLU service was trained on the in-domain text, so a result that reads like one of its
lines (entities marked by type: "tell {person} the {machine} is free") is one it understands,
and, on the workshop corpus, one whose entities are nearly always right: of 107 results that
equal a line, 106 had exactly the right entities; one word away 57 of 63; four or more words
away 50 of 138. Garbage from a noisy recording ("connie incendiary", "not that thunderstorm")
finds no entity to doubt, so the entity scores cannot flag it, but it is far from every line.

``NearestLine`` counts the fewest word substitutions, insertions and deletions that turn the
marked text into some in-domain line, and how many slots that line holds beyond the text's
entities: "the next stern gland needs replacing" is two edits from "{vessel} s stern gland needs
replacing", a line with a slot the result does not fill, so most likely a name was said there
and not found (of such results on the example corpora, 11-28% had the right entities, against
88% with no slot missing). Among lines equally near, the one missing the fewest slots counts.
Entities of a type that line has no slot for are foreign to it: "touch up the sling marks on
{place}" against "touch up the sling marks on {vessel}" (a place heard where a vessel was said).
Each distinct word is coded as one character, so the comparison is done by rapidfuzz (in C), one
call per line length, nearest lengths first: about 30 us against the workshop's 219 lines.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Iterator, Sequence
from typing import NamedTuple

import numpy as np
from rapidfuzz.distance import Levenshtein
from rapidfuzz.process import cdist, extract, extractOne

from stages.indomain.text import is_marker

__all__ = ["Nearest", "NearestLine"]


class Nearest(NamedTuple):
    """A text against the nearest in-domain line."""

    edits: int  # fewest word edits to a line
    missing: int  # slots of that line (the fewest among lines as near) no entity of the text fills
    missing_type: str | None  # the first such slot's entity type
    foreign: int = 0  # entities of the text whose type that line has no slot for


def _character(number: int) -> str:
    """The ``number``-th code point from U+0100, the surrogate block skipped."""
    point = 0x100 + number
    return chr(point if point < 0xD800 else point + 0x800)


class NearestLine:
    """The in-domain lines as coded strings; ``edits`` measures a text against all of them."""

    def __init__(self, lines: Iterable[Sequence[str]]) -> None:
        self._codes: dict[str, str] = {}
        coded = {self._code(tokens) for tokens in lines if tokens}
        # Lines by length: the edits to a line are at least the difference in length, so the
        # search goes outwards from the text's own length and stops once no bucket can win.
        self._by_length: dict[int, list[str]] = {}
        for line in sorted(coded):
            self._by_length.setdefault(len(line), []).append(line)
        markers = {code: token for token, code in self._codes.items() if is_marker(token)}
        self._slots = {line: [markers[ch] for ch in line if ch in markers] for line in coded}  # markers, in order

    def __len__(self) -> int:
        return sum(len(lines) for lines in self._by_length.values())

    def _code(self, tokens: Sequence[str]) -> str:
        codes = self._codes
        for token in tokens:
            if token not in codes:
                codes[token] = _character(len(codes))
        return "".join(codes[token] for token in tokens)

    def own_share(self, *, most: int = 1000) -> float | None:
        """How far the lines are from one another: over the distinct lines, the mean of each
        one's word edits to the nearest other line, per word of it; None with fewer than two
        lines. A domain whose lines vary more (the boatyard's 0.55 against the workshop's 0.48)
        puts a right result further from its nearest line, so the gate reads a result's edit
        share against this one (feature line_edit_relative). Past ``most`` lines the mean is
        taken over ``most`` of them, evenly spaced in sorted order, each still against every
        line (a 20,000-line text would otherwise cost 400 million comparisons at load)."""
        lines = sorted(line for bucket in self._by_length.values() for line in bucket)
        if len(lines) < 2:
            return None
        step = max(1, -(-len(lines) // most))
        shares = []
        for start in range(0, len(lines), 256 * step):
            queries = lines[start:start + 256 * step:step]
            distances = cdist(queries, lines, scorer=Levenshtein.distance, dtype=np.int32)
            # Each query is one of the distinct lines: its smallest distance is 0, to itself.
            nearest_other = np.partition(distances, 1, axis=1)[:, 1]
            shares.append(nearest_other / np.array([len(line) for line in queries]))
        return float(np.mean(np.concatenate(shares)))

    def edits(self, tokens: Sequence[str]) -> int | None:
        """Fewest word edits from ``tokens`` (entities as ``{type}`` markers) to a line; None
        when there are no lines."""
        found = self.nearest(tokens)
        return None if found is None else found.edits

    def nearest(self, tokens: Sequence[str]) -> Nearest | None:
        """Fewest word edits from ``tokens`` (entities as ``{type}`` markers) to a line, and the
        slots that nearest line holds beyond the text's entities; None when there are no lines."""
        if not self._by_length:
            return None
        # A word no line uses gets a code of its own after the lines' words, one per distinct
        # word, so two unknown words never count as equal.
        unknown: dict[str, str] = {}
        known = len(self._codes)
        query = "".join(self._codes.get(token) or unknown.setdefault(token, _character(known + len(unknown)))
                        for token in tokens)
        best: int | None = None
        line = ""
        for length in sorted(self._by_length, key=lambda n: abs(n - len(query))):
            if best is not None and abs(length - len(query)) >= best:
                break
            found = extractOne(query, self._by_length[length], scorer=Levenshtein.distance,
                               score_cutoff=None if best is None else best - 1)
            if found is not None:
                best, line = int(found[1]), found[0]
        if best is None:
            return None
        entities = Counter(token for token in tokens if is_marker(token))
        count = sum(entities.values())
        if len(self._slots[line]) > count:
            # Another line as near may have fewer slots (the first such, in the lines' order).
            line = min([line, *self._as_near(query, best)], key=lambda found: len(self._slots[found]))
        slots = self._slots[line]
        missing = max(0, len(slots) - count)
        # Slot types the text's entities do not fill, and entity types the line has no slot for.
        unfilled, foreign = Counter(slots) - entities, entities - Counter(slots)
        first = next((marker[1:-1] for marker in slots if unfilled[marker]), None) if missing else None
        return Nearest(best, missing, first, sum(foreign.values()))

    def _as_near(self, query: str, edits: int) -> Iterator[str]:
        """Every line ``edits`` or fewer word edits from the coded ``query``."""
        for length, lines in self._by_length.items():
            if abs(length - len(query)) <= edits:
                for line, _, _ in extract(query, lines, scorer=Levenshtein.distance, score_cutoff=edits, limit=None):
                    yield line

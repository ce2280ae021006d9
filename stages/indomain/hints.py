"""Words that announce an entity type, read off the in-domain text instead of written by hand.

The NLU's training lines say what stands before each slot: "call {person}", "book the
{machine}", "moor her on {mooring}". A word that stands before slots of one type far more than
before others announces that type (a hint: "call" -> person); a word that stands before slots
of a type often, even if before others too, marks where a name of that type may begin (an
anchor: "the" -> machine). Both come from the user's own text, so they fit any trade.
"""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from stages.indomain.text import is_marker

__all__ = ["SlotNeighbours", "slot_neighbours"]


@dataclass(frozen=True, slots=True)
class SlotNeighbours:
    """How often each word stands right before a slot of each type, and how many slots each
    type has, over the distinct marked lines of the in-domain text."""

    before: dict[str, Counter[str]]  # word -> entity type -> count
    slots: Counter[str]  # entity type -> slots of that type
    starts: Counter[str]  # entity type -> slots that begin their line

    def hints(self, *, min_count: int = 2, min_share: float = 0.6) -> dict[str, list[str]]:
        """type -> words seen before its slots at least ``min_count`` times and, of all the
        slots they stand before, at least ``min_share`` of that type."""
        found: dict[str, list[str]] = defaultdict(list)
        for word, types in self.before.items():
            total = sum(types.values())
            for entity_type, count in types.items():
                if count >= min_count and count / total >= min_share:
                    found[entity_type].append(word)
        return {t: sorted(words) for t, words in sorted(found.items())}

    def anchors(self, *, min_count: int = 2, min_share: float = 0.2) -> dict[str, list[str]]:
        """type -> words seen before at least ``min_share`` of that type's slots (and at least
        ``min_count`` times): where its names usually begin, whatever else follows the word."""
        found: dict[str, list[str]] = defaultdict(list)
        for word, types in self.before.items():
            for entity_type, count in types.items():
                if count >= min_count and count / self.slots[entity_type] >= min_share:
                    found[entity_type].append(word)
        return {t: sorted(words) for t, words in sorted(found.items())}

    def start_share(self, entity_type: str) -> float:
        """The share of the type's slots that begin their line."""
        return self.starts[entity_type] / self.slots[entity_type] if self.slots[entity_type] else 0.0


def slot_neighbours(lines: Iterable[Sequence[str]]) -> SlotNeighbours:
    """Count the word before every ``{type}`` marker of the marked lines (each line once)."""
    before: dict[str, Counter[str]] = defaultdict(Counter)
    slots: Counter[str] = Counter()
    starts: Counter[str] = Counter()
    for tokens in {tuple(line) for line in lines}:
        for i, token in enumerate(tokens):
            if not is_marker(token):
                continue
            entity_type = token[1:-1]
            slots[entity_type] += 1
            if i == 0:
                starts[entity_type] += 1
            elif not is_marker(tokens[i - 1]):
                before[tokens[i - 1]][entity_type] += 1
    return SlotNeighbours(dict(before), slots, starts)

"""Slot recall: names of one type looked for where the context announces one.

A recogniser that does not know a name breaks it into everyday words ("siobhan virtanen" ->
"she voted comment"). Those runs are too far from the name in sound for the general matcher,
whose floors and common-word guard must keep everyday speech unchanged everywhere. Right after
a word that announces the type ("call", "for", "tell", ...) or at the start of the sentence,
a looser phone floor is safe enough when the in-domain language model agrees: the span's words
run together as one phone string (so word boundaries need not match) are aligned with every
form of the type, and the best forms are offered to the caller, which asks the model whether
the sentence reads likelier with the name in it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from rapidfuzz.distance import Levenshtein
from rapidfuzz.process import cdist

from stages.lexicon_compile import CompiledLexicon
from stages.phonetics import CostModel, batch_similarity

__all__ = ["SlotForms", "SlotMatch", "slot_anchors", "slot_candidates", "slot_forms"]


@dataclass(frozen=True, slots=True)
class SlotForms:
    """Every written form of the entries of one type, with its phones."""

    kind: str
    forms: tuple[int, ...]  # form numbers in the compiled lexicon
    phones: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class SlotMatch:
    form: int
    start: int  # word range in the tokens searched
    end: int
    phone: float  # feature-weighted phone similarity of the span and the form
    runner_up: float  # best similarity of a form of another entry to the same span


def slot_forms(lexicon: CompiledLexicon, kinds: Sequence[str], *, min_phones: int = 0) -> dict[str, SlotForms]:
    """Forms of each type with at least ``min_phones`` phones: a short alias ("fola", "ane")
    sounds like too many everyday words for a loose floor."""
    found: dict[str, SlotForms] = {}
    for kind in kinds:
        numbers = tuple(i for i, f in enumerate(lexicon.forms)
                        if lexicon.entries[f.entry].type == kind and len(f.phones) >= min_phones)
        found[kind] = SlotForms(kind, numbers, tuple(lexicon.forms[i].phones for i in numbers))
    return found


def slot_anchors(tokens: Sequence[str], hints: set[str], *, at_start: bool) -> list[int]:
    """Word positions where a slot may begin: just after a hint word, and (optionally) at 0."""
    positions = {i + 1 for i, token in enumerate(tokens[:-1]) if token in hints}
    if at_start and tokens:
        positions.add(0)
    return sorted(positions)


def slot_candidates(sounds: Sequence[str], anchors: Sequence[int], taken: Sequence[tuple[int, int]],
                    slot: SlotForms, lexicon: CompiledLexicon, costs: CostModel, *, max_words: int,
                    min_phone: float, min_edit: float = 0.4) -> list[SlotMatch]:
    """Spans starting at an anchor, free of ``taken`` words, whose best form reaches ``min_phone``.

    One match per (anchor, form entry) at most, best first. ``sounds`` are the phones of each
    word of the hypothesis.
    """
    spans: list[tuple[int, int, str]] = []
    for start in anchors:
        phones = ""
        for end in range(start + 1, min(len(sounds), start + max_words) + 1):
            if any(s < end and start < e for s, e in taken):
                break
            phones += sounds[end - 1]
            spans.append((start, end, phones))
    if not spans or not slot.forms:
        return []
    # A plain edit-distance similarity (rapidfuzz, in C) screens pairs before the costlier
    # feature alignment, as in the general matcher: it keeps the slot path's cost per message
    # near a tenth of a millisecond.
    screen = cdist([p for _, _, p in spans], list(slot.phones), scorer=Levenshtein.normalized_similarity,
                   score_cutoff=min_edit, dtype=np.float32)
    rows, columns = np.nonzero(screen)
    if rows.size == 0:
        return []
    aligned = batch_similarity([spans[r][2] for r in rows.tolist()], [slot.phones[c] for c in columns.tolist()], costs)
    similarity = np.zeros((len(spans), len(slot.forms)), dtype=np.float32)
    similarity[rows, columns] = aligned
    entries = np.array([lexicon.forms[f].entry for f in slot.forms])
    best: dict[tuple[int, int], SlotMatch] = {}
    for row in np.unique(rows).tolist():
        start, end, _ = spans[row]
        scores = similarity[row]
        top = int(np.argmax(scores))
        if scores[top] < min_phone:
            continue
        others = scores[entries != entries[top]]
        runner_up = float(others.max()) if others.size else 0.0
        key = (start, int(entries[top]))
        held = best.get(key)
        # Between spans of one anchor, the better-aligned one; at a tie the shorter one.
        if held is None or float(scores[top]) > held.phone:
            best[key] = SlotMatch(slot.forms[top], start, end, float(scores[top]), runner_up)
    return sorted(best.values(), key=lambda m: (-m.phone, m.start))

"""Carrier phrases: the in-domain sentences around their slots, to notice a slot left empty.

The commonest wrong result on real recogniser output is an entity that was never found:
"let tomatoes hello know the tamsin lathe is ready", where the NLU training data says
"let {person} know the {machine} is ready". Every word around the first slot is right and
the slot holds everyday words, so no entity score can be low - there is no entity. The
carrier words give it away. ``CarrierPhrases`` keeps the in-domain lines as templates (the
lexicon's names and aliases in literal lines become slots too) and tells, for a finished text
with its entities marked, which slots a template expects that no entity fills.

Carrier words must match exactly, or with ``loose_from`` one of them may be any word in lines
that have at least that many (an exact match is preferred). Allowing edits freely was tried on
the workshop corpus: the best approximate template then "explains" most texts with a slot full
of everyday words, right results included, and the signal drowns. A text that an all-filled
template matches ("is the {machine} on" with the kiln found) is explained and reports nothing.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

from stages.indomain.text import read_slot_values, read_templates, slot_marker
from stages.normalize.tokens import tokenize

__all__ = ["CarrierPhrases", "Unfilled", "marked_lines", "replace_runs", "runs_by_first_word"]

_SLOT = re.compile(r"\{([^{}\s]+)\}")


@dataclass(frozen=True, slots=True)
class Unfilled:
    """A template that matches the text with a slot held by plain words."""

    type: str  # the empty slot's entity type
    words: str  # what the text has in its place
    template: str  # the template as written, slots included
    where: str  # file:line it came from
    start: int = 0  # the slot's token range in the tokens searched
    end: int = 0


@dataclass(frozen=True, slots=True)
class _Template:
    text: str
    where: str
    carrier: frozenset[str]
    slot_types: dict[str, str]  # regex group of each slot -> its entity type
    pattern: re.Pattern[str]
    loose: int = 0  # carrier words that may be any word


Runs = dict[str, list[tuple[tuple[str, ...], str]]]  # first word -> (words, replacement), longest first


def runs_by_first_word(pairs: Iterable[tuple[tuple[str, ...], str]]) -> Runs:
    """Word runs and their replacements, filed by first word with the longest run first."""
    runs: Runs = {}
    for words, replacement in pairs:
        if words:
            runs.setdefault(words[0], []).append((words, replacement))
    for listed in runs.values():
        listed.sort(key=lambda pair: -len(pair[0]))
    return runs


def replace_runs(tokens: Sequence[str], runs: Runs) -> list[str]:
    """``tokens`` with each occurrence of a run replaced by its one replacement token, left to
    right, the longest run first where several start at the same word."""
    out: list[str] = []
    i = 0
    while i < len(tokens):
        for words, replacement in runs.get(tokens[i], ()):
            if tuple(tokens[i:i + len(words)]) == words:
                out.append(replacement)
                i += len(words)
                break
        else:
            out.append(tokens[i])
            i += 1
    return out


def marked_lines(templates: Iterable[tuple[str, Sequence[str]]],
                 slot_values: dict[str, list[str]] | None = None) -> list[tuple[str, tuple[str, ...]]]:
    """Distinct in-domain lines as (location, tokens), the lexicon's names and aliases in a
    literal line replaced by their ``{type}`` marker, as a slot of that type would be."""
    names = runs_by_first_word((tuple(tokenize(value)), slot_marker(entity_type))
                               for entity_type, values in (slot_values or {}).items() for value in values)
    seen: set[tuple[str, ...]] = set()
    lines = []
    for where, tokens in templates:
        marked = tuple(replace_runs(tokens, names))
        if marked not in seen:
            seen.add(marked)
            lines.append((where, marked))
    return lines


class CarrierPhrases:
    """Templates from in-domain text; ``unfilled`` finds a slot that plain words hold."""

    def __init__(self, templates: Iterable[tuple[str, Sequence[str]]], *,
                 slot_values: dict[str, list[str]] | None = None,
                 max_slot_words: int = 5, min_carrier_words: int = 2, loose_from: int = 0) -> None:
        # Every distinct line, marked, short ones included (the gate measures distance to them).
        self.lines = marked_lines(templates, slot_values)
        self._templates: list[_Template] = []
        for where, marked in self.lines:
            slot_types = {f"s{i}": m.group(1) for i, t in enumerate(marked) if (m := _SLOT.fullmatch(t))}
            at_carrier = [i for i in range(len(marked)) if f"s{i}" not in slot_types]
            carrier = [marked[i] for i in at_carrier]
            if len(carrier) < min_carrier_words:
                continue
            self._templates.append(_Template(text=" ".join(marked), where=where, carrier=frozenset(carrier),
                                             slot_types=slot_types, pattern=self._compile(marked, max_slot_words)))
            if loose_from and len(carrier) >= max(loose_from, 2) and slot_types:  # a variant keeps a carrier word
                # Long lines also match with any one carrier word misheard ("he has the key for
                # ..." against "who has the key for {place}").
                for at in at_carrier:
                    rest = frozenset(marked[i] for i in at_carrier if i != at)
                    self._templates.append(_Template(
                        text=" ".join(marked), where=where, carrier=rest, slot_types=slot_types,
                        pattern=self._compile(marked, max_slot_words, loose=at), loose=1))
        # Each template is filed under its rarest carrier word: a text can only match templates
        # filed under one of its own words, so few patterns are ever tried.
        counts: dict[str, int] = {}
        for template in self._templates:
            for word in template.carrier:
                counts[word] = counts.get(word, 0) + 1
        self._by_word: dict[str, list[_Template]] = {}
        for template in self._templates:
            key = min(template.carrier, key=lambda w: (counts[w], w))
            self._by_word.setdefault(key, []).append(template)

    @classmethod
    def from_files(cls, text: Path, lexicon: Path | None = None, **options: int) -> CarrierPhrases:
        """Templates from an in-domain text file (FORMATS section 4), literal names turned into
        slots with the lexicon's names and aliases when a lexicon is given."""
        values = read_slot_values(lexicon) if lexicon is not None else None
        return cls(read_templates(text), slot_values=values, **options)

    def __len__(self) -> int:
        """Lines kept as templates (loose variants not counted)."""
        return sum(1 for t in self._templates if not t.loose)

    @staticmethod
    def _compile(marked: Sequence[str], max_slot_words: int, loose: int = -1) -> re.Pattern[str]:
        parts = []
        for index, token in enumerate(marked):
            slot = _SLOT.fullmatch(token)
            if index == loose:
                parts.append(r"[^{} ]+")
            elif slot is None:
                parts.append(re.escape(token))
            else:
                # Either the entity marker of that type, or 1..max_slot_words plain words (group s<i>).
                words = rf"(?:[^{{}} ]+ ){{0,{max_slot_words - 1}}}[^{{}} ]+"
                parts.append(rf"(?:{re.escape(token)}|(?P<s{index}>{words}))")
        return re.compile(" ".join(parts))

    def unfilled(self, tokens: Sequence[str]) -> Unfilled | None:
        """The first empty slot of the best template match (see ``empty_slots``), or None."""
        empty = self.empty_slots(tokens)
        return empty[0] if empty else None

    def empty_slots(self, tokens: Sequence[str]) -> list[Unfilled]:
        """Every slot that plain words hold in the best template match, for tokens in which
        entities are already replaced by ``{type}`` markers, in text order; empty when no
        template matches, or one matches with every slot filled by an entity (the text is
        explained)."""
        present = set(tokens)
        line = " ".join(tokens)
        best: tuple[int, int, str, list[Unfilled]] | None = None
        for word in present:
            for template in self._by_word.get(word, ()):
                if not template.carrier <= present:
                    continue
                match = template.pattern.fullmatch(line)
                if match is None:
                    continue
                found: list[Unfilled] = []
                for name, words in match.groupdict().items():
                    if words is None:
                        continue
                    start = line.count(" ", 0, match.start(name))
                    found.append(Unfilled(type=template.slot_types[name], words=words, template=template.text,
                                          where=template.where, start=start, end=start + len(words.split(" "))))
                if not found:
                    return []
                # Fewest plain words in slots: the template that explains most of the text.
                spread = sum(len(f.words.split()) for f in found)
                if best is None or (template.loose, spread, template.text) < best[:3]:
                    best = (template.loose, spread, template.text, found)
        return [] if best is None else best[3]

    @staticmethod
    def marked(text: str, spans: Iterable[tuple[int, int, str]]) -> list[str]:
        """Tokens of ``text`` with each (start, end, type) entity span replaced by its marker."""
        tokens: list[str] = []
        at = 0
        for start, end, entity_type in sorted(spans):
            if start < at:
                continue  # overlapping spans: the first one stands
            tokens += tokenize(text[at:start])
            tokens.append(slot_marker(entity_type))
            at = end
        tokens += tokenize(text[at:])
        return tokens

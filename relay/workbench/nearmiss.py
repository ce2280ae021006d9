"""Near misses: where the recogniser heard a domain term as other words, in an otherwise
well-heard utterance. Each becomes an extra NLU training example (the heard text, with the
misheard words labelled as the entity they stand for) and an alias suggestion.

An NLU trained on these learns the recogniser's habits: the relay corrects what it can, and
what slips past still lands on the right entity.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from relay.workbench.alignment import align, aligned_span
from relay.workbench.corpus import CorpusItem
from stages.lexicon.data import LexiconEntry
from stages.normalize.tokens import tokenize

__all__ = ["NearMiss", "TrainingExample", "alias_suggestions", "find_near_misses", "training_examples"]


@dataclass(frozen=True, slots=True)
class NearMiss:
    utterance: str  # corpus id
    entity: str  # lexicon id
    said: str  # the entity's words in the reference
    heard: str  # what the recogniser produced in their place
    rank: int  # which hypothesis (0 = the recogniser's first)
    context_error: float  # word error rate outside the entities


@dataclass(slots=True)
class TrainingExample:
    text: str
    entities: list[dict[str, Any]] = field(default_factory=list)
    source: str = ""
    reference: str = ""


def _find(words: list[str], part: list[str]) -> int | None:
    for start in range(len(words) - len(part) + 1):
        if words[start:start + len(part)] == part:
            return start
    return None


def _char_span(words: list[str], start: int, end: int) -> tuple[int, int]:
    begin = sum(len(w) + 1 for w in words[:start])
    return begin, begin + len(" ".join(words[start:end]))


def _entity_spans(item: CorpusItem, reference: list[str]) -> list[tuple[str, int, int]]:
    spans = []
    for entity_id, text in item.entity_texts:
        part = tokenize(text)
        start = _find(reference, part) if part else None
        if start is not None:
            spans.append((entity_id, start, start + len(part)))
    return spans


def _examine(item: CorpusItem, depth: int, max_context_error: float) -> Iterable[tuple[NearMiss, TrainingExample]]:
    reference = tokenize(item.reference)
    spans = _entity_spans(item, reference)
    if not spans:
        return
    inside = {i for _, start, end in spans for i in range(start, end)}
    context_words = max(1, len(reference) - len(inside))
    seen: set[tuple[str, ...]] = set()
    for rank, hypothesis in enumerate(item.utterance().nbest):
        heard_words = tokenize(hypothesis.text)
        if tuple(heard_words) in seen:
            continue
        seen.add(tuple(heard_words))
        if len(seen) > depth:
            break
        pairs = align(reference, heard_words)
        context_errors = sum(
            1 for ref, hyp in pairs
            if (ref is None or ref not in inside) and (ref is None or hyp is None or reference[ref] != heard_words[hyp])
        )
        context_error = context_errors / context_words
        if context_error > max_context_error:
            continue
        example = TrainingExample(text=" ".join(heard_words), source=item.id, reference=item.reference)
        misses = []
        for entity_id, start, end in spans:
            found = aligned_span(pairs, start, end)
            if found is None:
                continue
            heard = " ".join(heard_words[found[0]:found[1]])
            char_start, char_end = _char_span(heard_words, *found)
            example.entities.append({"id": entity_id, "span": [char_start, char_end], "heard": heard})
            said = " ".join(reference[start:end])
            if heard != said:
                misses.append(NearMiss(item.id, entity_id, said, heard, rank, round(context_error, 3)))
        for miss in misses:
            yield miss, example


def find_near_misses(
    items: Iterable[CorpusItem], *, depth: int = 3, max_context_error: float = 0.25
) -> tuple[list[NearMiss], list[TrainingExample]]:
    """Near misses among the first ``depth`` distinct hypotheses of each utterance, and the
    training examples (one per distinct heard text) that carry them."""
    misses: list[NearMiss] = []
    examples: dict[str, TrainingExample] = {}
    for item in items:
        for miss, example in _examine(item, depth, max_context_error):
            misses.append(miss)
            examples.setdefault(example.text, example)
    return misses, list(examples.values())


def training_examples(examples: Iterable[TrainingExample], lexicon: Mapping[str, LexiconEntry]) -> list[dict[str, Any]]:
    """Examples as JSON-ready records, each entity labelled with its type and canonical name."""
    records = []
    for example in examples:
        entities = []
        for entity in example.entities:
            entry = lexicon.get(entity["id"])
            entities.append({**entity, "type": entry.type if entry else None, "value": entry.name if entry else None})
        records.append({"text": example.text, "entities": entities, "source": example.source,
                        "reference": example.reference})
    return records


def alias_suggestions(misses: Iterable[NearMiss], *, min_count: int = 2) -> list[tuple[str, str, int]]:
    """(entity id, heard words, utterances) for mishearings seen in at least ``min_count``
    utterances (several hypotheses of one utterance count once)."""
    counts = Counter((entity, heard) for entity, heard, _ in {(m.entity, m.heard, m.utterance) for m in misses})
    return sorted(((entity, heard, n) for (entity, heard), n in counts.items() if n >= min_count),
                  key=lambda row: (-row[2], row[0], row[1]))

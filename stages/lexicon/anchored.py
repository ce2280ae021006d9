"""Anchored search: names of one type looked for right after a word that announces the type.

A recogniser that does not know a name breaks it into everyday words ("siobhan virtanen" ->
"she voted comment"). Those runs are too far from the name in sound for the general matcher,
whose floors and common-word guard must keep everyday speech unchanged everywhere. Right after
a word that announces the type ("call", "for", "tell", ...) or at the start of the sentence,
a looser phone floor is safe enough when the in-domain language model agrees: the span's words
run together as one phone string (so word boundaries need not match) are aligned with every
form of the type, and ``AnchoredSearch`` asks the model whether the sentence reads likelier
with the name in it. Its guards keep the trace names they had when this was called slot
recall: ``slot_pooled``, ``slot_margin``, ``slot_context``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from rapidfuzz.distance import Levenshtein
from rapidfuzz.process import cdist

from relay.core.utterance import Utterance
from stages.lexicon.choice import Choice, describe, likeliest
from stages.lexicon.compile import CompiledLexicon
from stages.lexicon.context import ContextScorer
from stages.lexicon.match import Evidence, Sighting
from stages.lexicon.rewrite import map_span
from stages.lexicon.settings import AnchoredSettings
from stages.lexicon.sound.phonetics import CostModel, batch_similarity
from stages.lexicon.sound.pronounce import Pronouncer

__all__ = ["AnchoredForms", "AnchoredHypothesis", "AnchoredMatch", "AnchoredSearch", "PooledAnchored",
           "anchor_positions", "anchored_forms", "anchored_matches", "pool_anchored"]


@dataclass(frozen=True, slots=True)
class AnchoredForms:
    """Every written form of the entries of one type, with its phones."""

    entity_type: str
    forms: tuple[int, ...]  # form numbers in the compiled lexicon
    phones: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class AnchoredMatch:
    form: int
    start: int  # word range in the tokens searched
    end: int
    phone: float  # feature-weighted phone similarity of the span and the form
    runner_up: float  # best similarity of a form of another entry to the same span
    hypothesis: int = 0  # which of the hypotheses searched holds the span


@dataclass(frozen=True, slots=True)
class AnchoredHypothesis:
    """One hypothesis as the anchored search reads it."""

    sounds: Sequence[str]  # phones of each word
    anchors: Sequence[int]  # word positions where a name may begin
    taken: Sequence[tuple[int, int]] = ()  # word ranges already holding an entity


@dataclass(frozen=True, slots=True)
class PooledAnchored:
    """What the N-best says about one entry of a type searched after its anchors."""

    entry: int
    strongest: AnchoredMatch  # the match with the most posterior-weighted phone similarity
    pooled: float  # sum over hypotheses of posterior x best phone similarity
    support: dict[int, AnchoredMatch]  # hypothesis -> its best match of the entry


def anchored_forms(lexicon: CompiledLexicon, entity_types: Sequence[str], *,
                   min_phones: int = 0) -> dict[str, AnchoredForms]:
    """Forms of each type with at least ``min_phones`` phones: a short alias ("fola", "ane")
    sounds like too many everyday words for a loose floor."""
    found: dict[str, AnchoredForms] = {}
    for entity_type in entity_types:
        numbers = tuple(i for i, f in enumerate(lexicon.forms)
                        if lexicon.entries[f.entry].type == entity_type and len(f.phones) >= min_phones)
        found[entity_type] = AnchoredForms(entity_type, numbers, tuple(lexicon.forms[i].phones for i in numbers))
    return found


def anchor_positions(tokens: Sequence[str], hints: set[str], *, at_start: bool) -> list[int]:
    """Word positions where a name may begin: just after a hint word, and (optionally) at 0."""
    positions = {i + 1 for i, token in enumerate(tokens[:-1]) if token in hints}
    if at_start and tokens:
        positions.add(0)
    return sorted(positions)


def anchored_matches(hypotheses: Sequence[AnchoredHypothesis], forms: AnchoredForms, lexicon: CompiledLexicon,
                     costs: CostModel, *, max_words: int, min_phone: float, align_floor: float = 0.4
                     ) -> list[AnchoredMatch]:
    """Matches in several hypotheses at once; ``AnchoredMatch.hypothesis`` indexes ``hypotheses``.

    Hypotheses of one N-best share most of their spans, so each distinct phone string is
    screened and aligned once.
    """
    rows: dict[str, int] = {}
    spans: list[tuple[int, int, int, int]] = []  # (hypothesis, start, end, row)
    for number, hypothesis in enumerate(hypotheses):
        sounds = hypothesis.sounds
        for start in hypothesis.anchors:
            phones = ""
            for end in range(start + 1, min(len(sounds), start + max_words) + 1):
                if any(s < end and start < e for s, e in hypothesis.taken):
                    break
                phones += sounds[end - 1]
                spans.append((number, start, end, rows.setdefault(phones, len(rows))))
    if not spans or not forms.forms:
        return []
    # A plain edit-distance similarity (rapidfuzz, in C) screens pairs before the costlier
    # feature alignment, as in the general matcher: it keeps the anchored search's cost per
    # message near a tenth of a millisecond.
    screen = cdist(list(rows), list(forms.phones), scorer=Levenshtein.normalized_similarity,
                   score_cutoff=align_floor, dtype=np.float32)
    hit_rows, columns = np.nonzero(screen)
    if hit_rows.size == 0:
        return []
    texts = list(rows)
    aligned = batch_similarity([texts[r] for r in hit_rows.tolist()], [forms.phones[c] for c in columns.tolist()],
                               costs)
    similarity = np.zeros((len(rows), len(forms.forms)), dtype=np.float32)
    similarity[hit_rows, columns] = aligned
    entries = np.array([lexicon.forms[f].entry for f in forms.forms])
    leaders: dict[int, tuple[int, float, float]] = {}  # row -> (form column, phone, runner-up)
    for row in np.unique(hit_rows).tolist():
        scores = similarity[row]
        column = int(np.argmax(scores))
        if scores[column] < min_phone:
            continue
        others = scores[entries != entries[column]]
        leaders[row] = (column, float(scores[column]), float(others.max()) if others.size else 0.0)
    kept: dict[tuple[int, int, int], AnchoredMatch] = {}  # (hypothesis, anchor, entry) -> its match
    for number, start, end, row in spans:
        if row not in leaders:
            continue
        column, phone, runner_up = leaders[row]
        key = (number, start, int(entries[column]))
        held = kept.get(key)
        # Between spans of one anchor, the better-aligned one; at a tie the shorter one.
        if held is None or phone > held.phone:
            kept[key] = AnchoredMatch(forms.forms[column], start, end, phone, runner_up, number)
    return sorted(kept.values(), key=lambda m: (-m.phone, m.hypothesis, m.start))


def pool_anchored(matches: Sequence[AnchoredMatch], posteriors: Sequence[float],
                  lexicon: CompiledLexicon) -> list[PooledAnchored]:
    """Per entry: the best match in each hypothesis, summed by posterior as the general search
    pools its evidence; the strongest is the match of the hypothesis contributing most. Most
    pooled first."""
    per_entry: dict[int, dict[int, AnchoredMatch]] = {}
    for match in matches:
        held = per_entry.setdefault(lexicon.forms[match.form].entry, {})
        if match.hypothesis not in held or match.phone > held[match.hypothesis].phone:
            held[match.hypothesis] = match
    pooled = []
    for entry, held in per_entry.items():
        strongest = max(held.values(), key=lambda m: (posteriors[m.hypothesis] * m.phone, -m.hypothesis))
        total = float(sum(posteriors[h] * m.phone for h, m in held.items()))
        pooled.append(PooledAnchored(entry, strongest, total, held))
    return sorted(pooled, key=lambda p: (-p.pooled, -p.strongest.phone, p.entry))


class AnchoredSearch:
    """Names of ``settings.types`` looked for right after their hint words, in the likeliest hypotheses."""

    def __init__(self, settings: AnchoredSettings, lexicon: CompiledLexicon, *, pronouncer: Pronouncer,
                 costs: CostModel, hints: dict[str, set[str]], model: Any, cap: float,
                 types: Sequence[str], anchors: dict[str, list[str]]) -> None:
        """``types`` and ``anchors`` are the settings' own when given, else read off the in-domain text."""
        self.settings = settings
        self.lexicon = lexicon
        self.pronouncer = pronouncer
        self.costs = costs
        self.model = model  # the in-domain language model, or None
        self.cap = cap  # gains are clipped to +-cap nats, so min_gain above it could never pass
        self.forms = anchored_forms(lexicon, types, min_phones=settings.min_phones)
        self.hints = {entity_type: hints.get(entity_type, set()) | set(anchors.get(entity_type, ()))
                      for entity_type in self.forms}

    def recall(self, utterance: Utterance, top: int, placed: list[Choice], blocked: list[dict[str, Any]],
               context: ContextScorer | None) -> list[Choice]:
        """Names found where no entity is placed yet; a trace record in ``blocked`` for each one
        a guard stopped.

        The ``hypotheses`` likeliest hypotheses are searched, each after its own hint words (a
        hint the top hypothesis misheard may survive in another), and each entry's matches are
        pooled by posterior. The span of the hypothesis contributing most is carried over to the
        top one. A match needs the looser phone floor, ``min_pooled`` pooled evidence and, with a
        language model, its hypothesis must read at least ``min_gain`` nats likelier with the
        name in it: sound and context agree.
        """
        s = self.settings
        lexicon = self.lexicon
        nbest = utterance.nbest
        tokens = nbest[top].tokens
        order = likeliest(nbest, top, s.hypotheses)
        sounds = [[self.pronouncer.word(token) for token in nbest[h].tokens] for h in order]
        posteriors = [nbest[h].posterior for h in order]
        taken = [(c.start, c.end) for c in placed]
        entries = {c.evidence.entry for c in placed}
        scorers: dict[int, ContextScorer | None] = {top: context}
        found: list[Choice] = []
        for entity_type, forms in self.forms.items():
            hints = self.hints[entity_type]
            searched = [AnchoredHypothesis(sounds[i], anchor_positions(nbest[h].tokens, hints, at_start=s.at_start),
                                           taken if h == top else ()) for i, h in enumerate(order)]
            floor = s.floors.get(entity_type, s.min_phone)
            matches = anchored_matches(searched, forms, lexicon, self.costs, max_words=s.max_words,
                                       min_phone=floor, align_floor=s.align_floor)
            for pooled in pool_anchored(matches, posteriors, lexicon):
                match = pooled.strongest
                hypothesis = order[match.hypothesis]
                form = lexicon.forms[match.form]
                start, end = map_span(nbest[hypothesis].tokens, tokens, match.start, match.end)
                if end <= start or form.entry in entries or any(b < end and start < e for b, e in taken):
                    continue
                if " ".join(tokens[start:end]) == form.text:
                    continue  # exact text is the general search's job
                if hypothesis not in scorers:
                    scorers[hypothesis] = ContextScorer(self.model, nbest[hypothesis].tokens,
                                                        cap=self.cap) if self.model else None
                scorer = scorers[hypothesis]
                # The context is judged where the name was heard, with the hint word that hypothesis holds.
                gain = scorer.gain(match.start, match.end, form.text.split()) if scorer is not None else 0.0
                support = {order[i]: Sighting(m.phone, m.start, m.end, m.form, False)
                           for i, m in pooled.support.items()}
                choice = Choice(Evidence(form.entry, pooled.pooled, support), match.phone, start, end,
                                match.form, False, False, gain, origin="anchored", margin=match.phone - match.runner_up)
                if pooled.pooled < s.min_pooled:
                    reason = "slot_pooled"
                elif match.phone - match.runner_up < s.margin:
                    reason = "slot_margin"
                elif scorer is not None and gain < min(s.min_gain, self.cap):
                    reason = "slot_context"
                else:
                    found.append(choice)
                    taken.append((start, end))
                    entries.add(form.entry)
                    continue
                blocked.append(describe(choice, lexicon, tokens) | {"guard": reason})
        return found

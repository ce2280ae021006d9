"""Spans of the N-best, their candidate entries and scores, and evidence pooled by posterior.

A span is any run of 1..k words of a hypothesis, pronounced as one phone string; identical
word runs in several hypotheses are one span with several occurrences. Candidates come from
the phone index; each (span, form) pair is scored as a weighted mean of

- phone similarity: 1 - feature-weighted alignment cost / longer length (sound.phonetics),
- spelling similarity: rapidfuzz's normalised Indel ratio of the two texts, spaces removed,
- key agreement: the best normalised Levenshtein similarity between the Double Metaphone keys.

An exact written match scores 1.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt
from rapidfuzz.distance import Levenshtein
from rapidfuzz.fuzz import ratio
from rapidfuzz.process import cpdist

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import CompiledLexicon, Form, word_run_keys
from stages.lexicon.sound.kernels import compiled
from stages.lexicon.sound.phonetics import (
    _CHAR_BASE,
    BROAD_CODES,
    PHONES,
    SKELETON_CODES,
    CostModel,
    batch_similarity,
)
from stages.lexicon.sound.pronounce import Pronouncer

if TYPE_CHECKING:
    from stages.lexicon.settings import MatchSettings

__all__ = ["Evidence", "Sighting", "Spans", "Weights", "best_entries", "find_spans", "pool", "score_pairs",
           "score_spans"]


@dataclass(frozen=True, slots=True)
class Weights:
    phone: float
    spelling: float
    keys: float
    candidates: int
    min_retrieval: float
    pair_floor: float  # pairs that cannot reach this score are dropped before the costlier signals
    min_phone: float  # pairs whose phones agree less than this are dropped whatever their spelling
    align_floor: float  # pairs below this unit-cost phone similarity are not aligned at all
    broad_candidates: int = 0  # forms taken per span from the broad-class index as well (0: none)
    broad_min_retrieval: float = 0.3
    skeleton_candidates: int = 0  # and from the consonant-skeleton index (0: none)
    skeleton_min_retrieval: float = 0.6

    @classmethod
    def of(cls, match: MatchSettings) -> Weights:
        """The weights and floors the stage's ``match`` settings give."""
        return cls(match.weight_phone, match.weight_spelling, match.weight_keys, match.candidates,
                   match.min_retrieval, match.pair_floor, match.min_phone, align_floor=match.align_floor,
                   broad_candidates=match.broad_candidates, broad_min_retrieval=match.broad_min_retrieval,
                   skeleton_candidates=match.skeleton_candidates, skeleton_min_retrieval=match.skeleton_min_retrieval)


@dataclass(slots=True)
class Spans:
    """The distinct word runs of an N-best, one column per attribute; a span is an index into them."""

    words: list[tuple[str, ...]]
    phones: list[str]  # the words' phones run together
    texts: list[str]  # the words joined by spaces
    occurrences: list[list[tuple[int, int, int]]]  # (hypothesis, start, end)

    def __len__(self) -> int:
        return len(self.words)


# Not frozen: about 170 are made per message, and a frozen dataclass's __init__ costs 7-10% of
# the stage's time (measured on 10-best messages against a 10k-entry lexicon).
@dataclass(slots=True)
class Sighting:
    """Where one hypothesis holds an entry: its best span there and how well it matches."""

    score: float
    start: int  # word range in that hypothesis
    end: int
    form: int  # the entry's form the span matches
    exact: bool  # the span's words are the form's text


@dataclass(slots=True)
class Evidence:
    """What the N-best says about one entry."""

    entry: int
    pooled: float = 0.0  # sum over hypotheses of posterior x best span score
    per_hypothesis: dict[int, Sighting] = field(default_factory=dict)


def find_spans(nbest: Sequence[Hypothesis], longest: int, pronouncer: Pronouncer) -> Spans:
    word = pronouncer.word
    token_lists = [hypothesis.tokens for hypothesis in nbest]
    sound_lists = [[word(token) for token in tokens] for tokens in token_lists]
    if compiled is not None:
        return Spans(*compiled.word_spans(token_lists, sound_lists, longest))
    return _word_spans_python(token_lists, sound_lists, longest)


def _word_spans_python(token_lists: Sequence[Sequence[str]], sound_lists: Sequence[Sequence[str]],
                       longest: int) -> Spans:
    index: dict[tuple[str, ...], int] = {}
    spans = Spans([], [], [], [])
    for number, (hypothesis, sounds) in enumerate(zip(token_lists, sound_lists)):
        tokens = tuple(hypothesis)
        count = len(tokens)
        for start in range(count):
            phones = ""
            for end in range(start + 1, min(count, start + longest) + 1):
                phones += sounds[end - 1]  # a span's phones are its words' phones run together
                words = tokens[start:end]
                at = index.get(words)
                if at is None:
                    index[words] = len(spans.words)
                    spans.words.append(words)
                    spans.phones.append(phones)
                    spans.texts.append(" ".join(words))
                    spans.occurrences.append([(number, start, end)])
                else:
                    spans.occurrences[at].append((number, start, end))
    return spans


_span_keys = lru_cache(maxsize=32768)(word_run_keys)  # span words recur from message to message


def score_spans(spans: Spans, lexicon: CompiledLexicon, weights: Weights,
                costs: CostModel) -> list[tuple[int, int, float, bool]]:
    """(span, form, score, exact) for every candidate pair worth keeping."""
    pairs: list[tuple[int, int, float, bool]] = []
    exact_pairs: set[tuple[int, int]] = set()
    exact = lexicon.exact
    for number, text in enumerate(spans.texts):
        if text in exact:
            for form in exact[text]:
                pairs.append((number, form, 1.0, True))
                exact_pairs.add((number, form))
    hits = lexicon.index.search(spans.phones, k=weights.candidates,
                                min_score=weights.min_retrieval)
    # Two more ways in: the same search over broad phone classes, for spans whose vowels or
    # voicing the recogniser changed, and over consonant skeletons, for spans that gained or lost
    # a vowel; a pair found several ways is kept once, where it came first.
    more = [index.search(spans.phones, k=k, min_score=least, recast=codes)
            for index, codes, k, least in ((lexicon.broad_index, BROAD_CODES, weights.broad_candidates,
                                            weights.broad_min_retrieval),
                                           (lexicon.skeleton_index, SKELETON_CODES, weights.skeleton_candidates,
                                            weights.skeleton_min_retrieval)) if k]
    forms = lexicon.forms
    if compiled is not None:
        query, item = hits.query, hits.item
        for extra_hits in more:
            size = len(query) + len(extra_hits.query)
            merged_query, merged_item = np.empty(size, np.int32), np.empty(size, np.int32)
            found = compiled.merge_hits(query, item, extra_hits.query, extra_hits.item, merged_query, merged_item)
            query, item = merged_query[:found], merged_item[:found]
        return _score_pairs_compiled(spans, forms, query, item, exact_pairs, weights, costs, pairs)
    queries, items = hits.query.tolist(), hits.item.tolist()
    for extra_hits in more:
        seen = set(zip(queries, items))
        extra = [(q, f) for q, f in zip(extra_hits.query.tolist(), extra_hits.item.tolist()) if (q, f) not in seen]
        queries += [q for q, _ in extra]
        items += [f for _, f in extra]
    return _score_pairs_python(spans, forms, queries, items, exact_pairs, weights, costs, pairs)


def score_pairs(spans: Spans, lexicon: CompiledLexicon, queries: Sequence[int], items: Sequence[int],
                weights: Weights, costs: CostModel) -> list[tuple[int, int, float, bool]]:
    """(span, form, score, False) for the given span/form pairs that pass the same screen and
    floors as the pairs ``score_spans`` retrieves, scored the same way."""
    if compiled is not None:
        return _score_pairs_compiled(spans, lexicon.forms, np.asarray(queries, dtype=np.int32),
                                     np.asarray(items, dtype=np.int32), set(), weights, costs, [])
    return _score_pairs_python(spans, lexicon.forms, list(queries), list(items), set(), weights, costs, [])


def _score_pairs_python(spans: Spans, forms: list[Form], queries: list[int], items: list[int],
                        exact_pairs: set[tuple[int, int]], weights: Weights, costs: CostModel,
                        pairs: list[tuple[int, int, float, bool]]) -> list[tuple[int, int, float, bool]]:
    # A plain edit-distance similarity (rapidfuzz, in C) screens pairs before the costlier
    # feature alignment; see stages/lexicon/README.md for how the threshold was chosen.
    screen = weights.align_floor
    phones = spans.phones
    edit = cpdist([phones[q] for q in queries], [forms[f].phones for f in items],
                  scorer=Levenshtein.normalized_similarity, dtype=np.float64)
    passed = (edit >= screen).tolist()
    if exact_pairs:
        chosen = [(q, f) for q, f, ok in zip(queries, items, passed) if ok and (q, f) not in exact_pairs]
    else:
        chosen = [(q, f) for q, f, ok in zip(queries, items, passed) if ok]
    if not chosen:
        return pairs
    phone = batch_similarity([phones[q] for q, _ in chosen], [forms[f].phones for _, f in chosen], costs)
    phone_weight, spelling, key_weight, min_phone = weights.phone, weights.spelling, weights.keys, weights.min_phone
    total = phone_weight + spelling + key_weight
    floor = weights.pair_floor * total
    # The same sums as pair by pair, in the same order, one array operation per term.
    phone_score = phone.astype(np.float64, copy=False)
    score = phone_weight * phone_score
    kept = np.flatnonzero(~((phone_score < min_phone) | (score + spelling + key_weight < floor))).tolist()
    if not kept:
        return pairs
    chosen = [chosen[i] for i in kept]
    score = score[kept]
    if spelling:
        texts = spans.texts
        joined = {q: texts[q].replace(" ", "") for q, _ in chosen}
        score = score + spelling * cpdist([joined[q] for q, _ in chosen],
                                          [forms[f].text.replace(" ", "") for _, f in chosen],
                                          scorer=ratio, dtype=np.float64) / 100.0
    if key_weight:
        # Pairs with no chance to reach the floor are dropped below whatever their keys say.
        score = score + key_weight * _key_agreements(chosen, spans, forms)
    for (q, f), value in zip(chosen, score.tolist()):
        if value >= floor:
            pairs.append((q, f, value / total, False))
    return pairs


def _score_pairs_compiled(spans: Spans, forms: list[Form], queries: npt.NDArray[np.int32],
                          items: npt.NDArray[np.int32], exact_pairs: set[tuple[int, int]], weights: Weights,
                          costs: CostModel, pairs: list[tuple[int, int, float, bool]]
                          ) -> list[tuple[int, int, float, bool]]:
    """The rest of ``score_spans`` pair by pair in C (stages/lexicon/sound/_lexfast.c): the screen,
    the alignment and the phone floors, then the spelling and key terms of the pairs left; the
    same floats in the same order as the array code below it, so the same pairs and scores."""
    if compiled is None:
        raise RuntimeError("the compiled kernels are not built")
    if exact_pairs:
        # Pairs as one number each (span x forms + form), so the exact ones drop out in one pass.
        keys = queries.astype(np.int64) * len(forms) + items
        exact = np.fromiter((q * len(forms) + f for q, f in exact_pairs), dtype=np.int64, count=len(exact_pairs))
        kept = ~np.isin(keys, exact)
        queries, items = queries[kept], items[kept]
    count = len(queries)
    if not count:
        return pairs
    total = weights.phone + weights.spelling + weights.keys
    floor = weights.pair_floor * total
    chosen_query = np.empty(count, dtype=np.int32)
    chosen_item = np.empty(count, dtype=np.int32)
    score = np.empty(count, dtype=np.float64)
    found = compiled.pair_screen(
        spans.phones, forms, np.ascontiguousarray(queries, dtype=np.int32), np.ascontiguousarray(items, dtype=np.int32),
        weights.align_floor, costs.sub_array, costs.insertion_array, costs.deletion_array, len(PHONES) + 1,
        _CHAR_BASE, weights.phone, weights.spelling, weights.keys, weights.min_phone, floor,
        chosen_query, chosen_item, score)
    if not found:
        return pairs
    span_keys: list[tuple[str, ...] | None] | None = None
    if weights.keys:
        span_keys = [None] * len(spans)
        words = spans.words
        for q in dict.fromkeys(chosen_query[:found].tolist()):
            span_keys[q] = _span_keys(words[q])
    compiled.pair_finish(spans.texts, span_keys, forms, chosen_query, chosen_item, score, found, weights.spelling,
                         weights.keys, floor, total, pairs)
    return pairs


def _key_agreements(chosen: list[tuple[int, int]], spans: Spans, forms: Sequence[Form]) -> npt.NDArray[np.float64]:
    """Per pair, the best normalised Levenshtein similarity between any span key and any form key.

    A run has one or two keys; taking its first and last covers both, so four similarities per
    pair hold every combination (a repeated one cannot change the maximum).
    """
    queries = [q for q, _ in chosen]
    words = spans.words
    keys = {q: _span_keys(words[q]) for q in dict.fromkeys(queries)}
    heard = [keys[q] for q in queries]
    known = [forms[f].keys for _, f in chosen]
    first = [k[0] for k in heard]
    last = [k[-1] for k in heard]
    their_first = [k[0] for k in known]
    their_last = [k[-1] for k in known]
    similar = cpdist(first + first + last + last, their_first + their_last + their_first + their_last,
                     scorer=Levenshtein.normalized_similarity, dtype=np.float64)
    best: npt.NDArray[np.float64] = similar.reshape(4, len(chosen)).max(axis=0)
    return best


def pool(spans: Spans, pairs: list[tuple[int, int, float, bool]], lexicon: CompiledLexicon,
         posteriors: Sequence[float], *, strong: float = 0.75) -> dict[int, Evidence]:
    """Per entry: best span score in each hypothesis, summed over hypotheses by posterior.

    Among spans scoring at least ``strong``, the one covering more words is preferred, so a
    near match of a full name ("tamsin okorra") is not lost to an exact match of its alias
    ("tamsin") alone. The compiled kernel (``pool_pairs`` in sound/_lexfast.c) does the same as
    ``_pool_python`` in C: the same entries, sightings and pooled floats in the same order.
    """
    if compiled is not None:
        evidence: dict[int, Evidence] = compiled.pool_pairs(spans.occurrences, pairs, lexicon.forms, posteriors,
                                                            strong, Evidence, Sighting)
        return evidence
    return _pool_python(spans, pairs, lexicon, posteriors, strong=strong)


def _pool_python(spans: Spans, pairs: list[tuple[int, int, float, bool]], lexicon: CompiledLexicon,
                 posteriors: Sequence[float], *, strong: float = 0.75) -> dict[int, Evidence]:
    evidence: dict[int, Evidence] = {}
    forms = lexicon.forms
    occurrences = spans.occurrences
    for q, f, score, exact in pairs:
        entry = forms[f].entry
        found = evidence.get(entry)
        if found is None:
            found = evidence[entry] = Evidence(entry, 0.0, {})
        held_by = found.per_hypothesis
        for hypothesis, start, end in occurrences[q]:
            held = held_by.get(hypothesis)
            if held is None:
                held_by[hypothesis] = Sighting(score, start, end, f, exact)
                continue
            seen = Sighting(score, start, end, f, exact)
            if _better(seen, held, strong, forms):
                held_by[hypothesis] = seen
    for found in evidence.values():
        found.pooled = float(sum([posteriors[h] * held.score for h, held in found.per_hypothesis.items()]))
    return evidence


def _better(new: Sighting, held: Sighting, strong: float, forms: Sequence[Form]) -> bool:
    # A strong near match of a longer form (the full name, more phones) beats a match of a
    # shorter one (an alias) inside it, exact ("tamsin") or near ("compressor" for "the
    # compressor", inside "qr e compressor" for "quarrie compressor"): it explains more of the
    # heard sounds. A longer span around the same form does not. Between two exact matches the
    # rule is the higher score.
    contains = (new.start <= held.start and held.end <= new.end and new.end - new.start > held.end - held.start
                and len(forms[new.form].phones) > len(forms[held.form].phones))
    inside = (held.start <= new.start and new.end <= held.end and held.end - held.start > new.end - new.start
              and len(forms[held.form].phones) > len(forms[new.form].phones))
    if not new.exact and new.score >= strong and contains:
        return True
    if not held.exact and held.score >= strong and inside:
        return False
    # Otherwise the higher score; at equal scores the longer span (it explains more words).
    return (new.score, new.end - new.start) > (held.score, held.end - held.start)


def best_entries(evidence: dict[int, Evidence], count: int) -> list[Evidence]:
    scores = np.fromiter((e.pooled for e in evidence.values()), dtype=np.float64, count=len(evidence))
    order = np.argsort(-scores)[:count]
    values = list(evidence.values())
    return [values[i] for i in order]

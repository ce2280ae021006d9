"""`rehear learn-costs`: a recogniser's phone confusions learned from a labelled corpus,
written as phone costs the lexicon stage reads (``match.costs``).

What was said (the reference) and what was heard (hypotheses) are pronounced with the lexicon
stage's own ``Pronouncer`` - an entity's words as the lexicon pronounces its form, `say`
included, since that is what the stage compares heard spans with - and aligned word by word
first (rapidfuzz's opcodes), so each phone alignment covers one misheard stretch and never
wanders across the sentence. The stretches go to EM (``relay.workbench.phone_channel``).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from rapidfuzz.distance import Levenshtein

from relay.core.errors import InputError
from relay.workbench.corpus import CorpusItem
from relay.workbench.phone_channel import Fit, PhonePair, chance_scale, fit_channel, to_costs
from stages.lexicon.data import LexiconEntry
from stages.lexicon.sound.phonetics import PHONES, CostModel, decode
from stages.lexicon.sound.pronounce import Pronouncer
from stages.normalize.tokens import tokenize

__all__ = ["Focus", "LearnOptions", "Learned", "Tally", "confusion_summary", "counts_table", "learn", "phone_pairs"]

Focus = Literal["all", "errors", "entities"]
Scale = Literal["chance", "fit"]


@dataclass(frozen=True, slots=True)
class LearnOptions:
    """How to learn; the defaults and what the alternatives measured are in stages/lexicon/README.md."""

    # Distinct hypotheses per utterance, rank r weighted 1/(r + 1), each utterance weighing 1 in
    # all. The first alone: five measured no different, and the first is what the recogniser
    # itself believed most.
    hypotheses: int = 1
    # Which stretches teach: all words (so also how often each phone is heard right), misheard
    # ones, or those holding entity words. The narrower two cost the chain more precision and
    # put the meant entry first less often than all words did (in 7 and 5 of 8 fits).
    focus: Focus = "all"
    # Pseudo-counts per said phone from the hand costs: a phone needs about this many sightings
    # before its own data outweigh them (5 and 100 measured the same within noise).
    prior_weight: float = 20.0
    iterations: int = 8  # from the sixth on, each moves the log-likelihood by under 0.05% (example corpora)
    max_phones: int = 40  # longer misheard stretches are left out: their alignment is guesswork
    # The costs' unit: "chance" keeps unrelated phone strings as far apart as the hand costs do,
    # so the stage's floors keep their meaning; in the fit's own unit the chain lost 1-5 points
    # of entity precision.
    scale: Scale = "chance"


@dataclass(slots=True)
class Tally:
    """What went into a fit, for the provenance and the command's summary."""

    utterances: int = 0
    hypotheses: int = 0
    entities: int = 0  # entity mentions found in the references
    entities_missing: int = 0  # mentions whose text is not in the reference (pronounced as plain words)
    stretches: int = 0  # misheard stretches aligned phone by phone
    too_long: int = 0  # stretches left out for max_phones
    heard_right: float = 0.0  # said phones in words heard right (weighted)


@dataclass(slots=True)
class Learned:
    model: CostModel
    fit: Fit
    scale: float  # nats per unit of cost in ``model``
    tally: Tally
    pairs: list[PhonePair] = field(default_factory=list)


_NUMBERS = {phone: number for number, phone in enumerate(PHONES)}


def _codes(phones: str) -> tuple[int, ...]:
    return tuple(_NUMBERS[phone] for phone in decode(phones))


@dataclass(frozen=True, slots=True)
class _Unit:
    text: str  # a reference word, or an entity mention's words joined by spaces
    phones: str  # encoded
    entity: bool


def _reference_units(item: CorpusItem, entries: Mapping[str, LexiconEntry], pronouncer: Pronouncer,
                     tally: Tally) -> list[_Unit]:
    """The reference as units: each entity mention one unit pronounced as the lexicon does, other words one each."""
    words = tokenize(item.reference)
    mentions: dict[int, tuple[int, str]] = {}  # start -> (end, phones)
    for entity_id, text in item.entity_texts:
        entry = entries.get(entity_id)
        if entry is None:
            raise InputError("corpus", f"{item.where}: entity {entity_id!r} is not in the lexicon")
        part = tokenize(text)
        start = next((i for i in range(len(words) - len(part) + 1) if part and words[i:i + len(part)] == part
                      and not any(s <= i < e or i <= s < i + len(part) for s, (e, _) in mentions.items())), None)
        if start is None:
            tally.entities_missing += 1
            continue
        tally.entities += 1
        mentions[start] = (start + len(part), pronouncer.form(" ".join(part), name=entry.name, say=entry.say))
    units: list[_Unit] = []
    i = 0
    while i < len(words):
        if i in mentions:
            end, phones = mentions[i]
            units.append(_Unit(" ".join(words[i:end]), phones, True))
            i = end
        else:
            units.append(_Unit(words[i], pronouncer.word(words[i]), False))
            i += 1
    return units


def _stretches(units: Sequence[_Unit], heard: Sequence[str]) -> Iterable[tuple[int, int, int, int]]:
    """(unit start, unit end, heard start, heard end) of each word-aligned stretch: equal units one
    by one, and each run of consecutive edits as one stretch."""
    run: list[int] | None = None
    for op in Levenshtein.opcodes([u.text for u in units], list(heard)):
        if op.tag == "equal":
            if run is not None:
                yield run[0], run[1], run[2], run[3]
                run = None
            for k in range(op.src_end - op.src_start):
                yield op.src_start + k, op.src_start + k + 1, op.dest_start + k, op.dest_start + k + 1
        elif run is None:
            run = [op.src_start, op.src_end, op.dest_start, op.dest_end]
        else:
            run[1], run[3] = op.src_end, op.dest_end
    if run is not None:
        yield run[0], run[1], run[2], run[3]


def phone_pairs(items: Iterable[CorpusItem], entries: Mapping[str, LexiconEntry], pronouncer: Pronouncer,
                options: LearnOptions) -> tuple[list[PhonePair], Tally]:
    """The corpus as weighted (said, heard) phone stretches; identical stretches merged."""
    tally = Tally()
    weights: dict[tuple[tuple[int, ...], tuple[int, ...]], float] = {}
    for item in items:
        units = _reference_units(item, entries, pronouncer, tally)
        hypotheses: list[list[str]] = []
        for hypothesis in item.utterance().nbest:
            tokens = tokenize(hypothesis.text)
            if tokens not in hypotheses:  # normalize merges what tokenises the same
                hypotheses.append(tokens)
        hypotheses = hypotheses[:options.hypotheses]
        if not hypotheses:
            continue
        tally.utterances += 1
        tally.hypotheses += len(hypotheses)
        prior = [1.0 / (rank + 1) for rank in range(len(hypotheses))]
        for heard_words, share in zip(hypotheses, prior):
            weight = share / sum(prior)
            for r1, r2, h1, h2 in _stretches(units, heard_words):
                entity = any(u.entity for u in units[r1:r2])
                said = "".join(u.phones for u in units[r1:r2])
                heard = "".join(pronouncer.word(w) for w in heard_words[h1:h2])
                right = " ".join(u.text for u in units[r1:r2]) == " ".join(heard_words[h1:h2]) or said == heard
                if (options.focus == "entities" and not entity) or (options.focus == "errors" and right):
                    continue
                if right:  # heard as said: counted phone by phone, nothing to align
                    tally.heard_right += weight * len(said)
                elif len(said) > options.max_phones or len(heard) > options.max_phones:
                    tally.too_long += 1
                    continue
                else:
                    tally.stretches += 1
                key = (_codes(said), _codes(said) if right else _codes(heard))
                weights[key] = weights.get(key, 0.0) + weight
    return [PhonePair(said, heard, weight) for (said, heard), weight in weights.items()], tally


def learn(items: Sequence[CorpusItem], entries: Mapping[str, LexiconEntry], *, options: LearnOptions,
          pronouncer: Pronouncer | None = None, prior: CostModel | None = None) -> Learned:
    """Fit the channel on ``items`` and turn it into costs; nothing of ``items`` is held out here."""
    pronouncer = pronouncer or Pronouncer()
    prior = prior or CostModel.features()
    pairs, tally = phone_pairs(items, entries, pronouncer, options)
    if not pairs:
        raise InputError("corpus", "no utterance with a hypothesis to learn from")
    fit = fit_channel(pairs, prior=prior, prior_weight=options.prior_weight, iterations=options.iterations)
    scale = chance_scale(fit.channel, pairs, prior) if options.scale == "chance" else fit.scale
    return Learned(to_costs(fit.channel, scale), fit, scale, tally, pairs)


def confusion_summary(learned: Learned, *, top: int = 12) -> list[tuple[str, str, float, float, float]]:
    """The most frequent confusions: (said, heard or '-', expected count, hand cost, learned cost)."""
    counts = learned.fit.counts.heard
    hand = CostModel.features()
    rows = []
    for s in range(len(PHONES)):
        for h in range(len(PHONES) + 1):
            if h == s or counts[s, h] <= 0:
                continue
            if h == len(PHONES):
                rows.append((PHONES[s], "-", float(counts[s, h]), hand.deletion[s], learned.model.deletion[s]))
            else:
                rows.append((PHONES[s], PHONES[h], float(counts[s, h]), hand.substitution[h][s],
                             learned.model.substitution[h][s]))
    rows.sort(key=lambda row: -row[2])
    return rows[:top]


def counts_table(learned: Learned) -> dict[str, object]:
    """The fit's expected counts, rounded, for the cost file's provenance."""
    counts = learned.fit.counts
    size = len(PHONES)
    return {"said_heard": [[round(float(v), 2) for v in row[:size]] for row in counts.heard],
            "not_heard": [round(float(v), 2) for v in counts.heard[:, size]],
            "inserted": [round(float(v), 2) for v in counts.inserted[:size]],
            "slots": round(float(counts.inserted[size]), 2),
            "said_phones": round(float(np.sum(counts.heard)), 1)}

"""Decide, reproducibly, what each corpus utterance says and how it is recorded.

About 70% of utterances reuse a phrasing from train.txt (split "seen") and 30% use
a phrasing that train.txt does not contain (split "novel"), so an evaluation can
tell memorised phrasings from new ones. Slots are filled from the lexicon, biased
towards what the chosen speaker uses most.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field
from typing import Literal

from examples.recording.scenario import SLOT, Entry, Part, Scenario, Settings

NOVEL_SHARE = 0.3
NO_ENTITY_SHARE = 0.1
AFFINITY_PICK = 0.7


@dataclass
class Plan:
    id: str
    split: Literal["seen", "novel"]
    template: str
    reference: str
    speak: str
    entities: list[dict[str, str]]
    speaker: str
    source: str
    voice: str
    snr_db: int | None = None
    extra: dict[str, str] = field(default_factory=dict)


def _pick_entry(rng: random.Random, pool: list[Entry], liked: dict[str, float], taken: set[str]) -> Entry:
    free = [e for e in pool if e.id not in taken]
    favourites = [e for e in free if e.id in liked]
    if favourites and rng.random() < AFFINITY_PICK:
        return rng.choices(favourites, weights=[liked[e.id] for e in favourites])[0]
    return rng.choices(free, weights=[e.weight for e in free])[0]


def _literal_mentions(template: str, scenario: Scenario) -> list[tuple[Entry, str]]:
    """Lexicon names or aliases written literally in a phrasing ("what's the kerf on ...")."""
    text = " " + SLOT.sub("#", template) + " "
    forms = sorted(
        ((form, e) for e in scenario.entries for form in (e.name, *e.aliases)),
        key=lambda pair: -len(pair[0]),
    )
    found: list[tuple[Entry, str]] = []
    for form, entry in forms:
        needle = f" {form} "
        if needle in text:
            found.append((entry, form))
            # Blank it out so a shorter form inside it is not counted again.
            text = text.replace(needle, " # ", 1)
    return found


def _fill(
    rng: random.Random, template: str, scenario: Scenario, liked: dict[str, float]
) -> tuple[str, str, list[dict[str, str]]]:
    literal = _literal_mentions(template, scenario)
    reference, speak = template, template
    for entry, form in literal:
        if form == entry.name and entry.say:
            speak = f" {speak} ".replace(f" {form} ", f" {entry.spoken()} ", 1).strip()
    used: list[Entry] = []
    mentions = [(entry, form) for entry, form in literal]
    taken = {e.id for e, _ in literal}
    for kind in SLOT.findall(template):
        entry = _pick_entry(rng, scenario.by_type(kind), liked, taken | {e.id for e in used})
        used.append(entry)
        mentions.append((entry, entry.name))
        reference = reference.replace("{" + kind + "}", entry.name, 1)
        speak = speak.replace("{" + kind + "}", entry.spoken(), 1)
    padded = f" {reference} "
    mentions.sort(key=lambda pair: padded.find(f" {pair[1]} "))
    return reference, speak, [{"id": e.id, "text": form} for e, form in mentions]


def _source(rng: random.Random, liked: dict[str, float], settings: Settings) -> str:
    """The device a speaker's utterance comes from: usually the one at their place."""
    homes = [
        settings.place_device[i] for i in sorted(liked, key=lambda i: -liked[i]) if i in settings.place_device
    ]
    if homes and rng.random() < settings.home_share:
        return homes[0]
    return rng.choice(settings.roaming)


def make_plans(
    scenario: Scenario,
    train: list[str],
    novel: list[str],
    settings: Settings,
    part: Part,
    count: int | None = None,
) -> list[Plan]:
    """The plans of one part (its first `count`); same inputs and seed give the same plans.

    Each part draws from its own random stream (its seed), so adding a part leaves
    the plans of the others unchanged. The draws happen in a fixed order: the
    noise assignment (a shuffle), then per utterance split, slot use, phrasing,
    speaker, slot fillers and device.
    """
    count = part.count if count is None else min(count, part.count)
    rng = random.Random(part.seed)
    pools = {
        ("seen", True): [t for t in train if SLOT.search(t)],
        ("seen", False): [t for t in train if not SLOT.search(t)],
        ("novel", True): [t for t in novel if SLOT.search(t)],
        ("novel", False): [t for t in novel if not SLOT.search(t)],
    }
    speakers = sorted(scenario.affinity)
    # Noise levels are dealt over the whole part, so a shorter `count` keeps each plan as is.
    order = list(range(part.count))
    rng.shuffle(order)
    snr: dict[int, int | None] = {i: None for i in range(part.count)}
    taken = 0
    for level, share in part.snr:
        size = round(part.count * share)
        snr.update({i: level for i in order[taken : taken + size]})
        taken += size

    plans: list[Plan] = []
    for i in range(count):
        split: Literal["seen", "novel"] = "novel" if rng.random() < NOVEL_SHARE else "seen"
        with_entities = rng.random() >= NO_ENTITY_SHARE
        template = rng.choice(pools[(split, with_entities)])
        speaker = rng.choice(speakers)
        liked = scenario.affinity[speaker]
        reference, speak, entities = _fill(rng, template, scenario, liked)
        plans.append(
            Plan(
                id=f"{settings.id_prefix}-{part.first + i:04d}",
                split=split,
                template=template,
                reference=reference,
                speak=speak,
                entities=entities,
                speaker=speaker,
                source=_source(rng, liked, settings),
                voice=settings.voices[(part.first - 1 + i) % len(settings.voices)],
                snr_db=snr[i],
            )
        )
    return plans

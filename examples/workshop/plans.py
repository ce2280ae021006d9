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

from examples.workshop.scenario import SLOT, Entry, Scenario

VOICES = ("slt", "rms", "awb")
NOVEL_SHARE = 0.3
NO_ENTITY_SHARE = 0.1
AFFINITY_PICK = 0.7
SNR_25_SHARE = 1 / 3
SNR_15_SHARE = 1 / 10

# Which device a speaker's utterance most likely comes from, by place entry.
PLACE_DEVICE = {
    "place.bay_1": "bench-1",
    "place.bay_2": "bench-2",
    "place.bay_3": "bench-3",
    "place.bay_4": "bench-4",
    "place.bay_5": "bench-5",
    "place.bay_6": "bench-6",
    "place.mezzanine": "mezzanine-kiosk",
    "place.wet_room": "wet-room-panel",
    "place.kiln_yard": "yard-panel",
    "place.front_desk": "front-desk",
    "place.loading_dock": "door-panel",
    "place.timber_store": "handheld-2",
    "place.electronics_corner": "bench-7",
}
ROAMING_DEVICES = (
    "handheld-1",
    "handheld-2",
    "door-panel",
    "front-desk",
    "mezzanine-kiosk",
)


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


def _pick_entry(
    rng: random.Random, pool: list[Entry], liked: dict[str, float], taken: set[str]
) -> Entry:
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
        entry = _pick_entry(
            rng, scenario.by_type(kind), liked, taken | {e.id for e in used}
        )
        used.append(entry)
        mentions.append((entry, entry.name))
        reference = reference.replace("{" + kind + "}", entry.name, 1)
        speak = speak.replace("{" + kind + "}", entry.spoken(), 1)
    padded = f" {reference} "
    mentions.sort(key=lambda pair: padded.find(f" {pair[1]} "))
    return reference, speak, [{"id": e.id, "text": form} for e, form in mentions]


def _source(rng: random.Random, liked: dict[str, float]) -> str:
    homes = [
        PLACE_DEVICE[i]
        for i in sorted(liked, key=lambda i: -liked[i])
        if i in PLACE_DEVICE
    ]
    if homes and rng.random() < 0.6:
        return homes[0]
    return rng.choice(ROAMING_DEVICES)


def make_plans(
    scenario: Scenario, train: list[str], novel: list[str], count: int, seed: int
) -> list[Plan]:
    """`count` utterance plans; same inputs and seed give the same plans."""
    rng = random.Random(seed)
    pools = {
        ("seen", True): [t for t in train if SLOT.search(t)],
        ("seen", False): [t for t in train if not SLOT.search(t)],
        ("novel", True): [t for t in novel if SLOT.search(t)],
        ("novel", False): [t for t in novel if not SLOT.search(t)],
    }
    speakers = sorted(scenario.affinity)
    order = list(range(count))
    rng.shuffle(order)
    n25, n15 = round(count * SNR_25_SHARE), round(count * SNR_15_SHARE)
    snr: dict[int, int | None] = {i: None for i in range(count)}
    snr.update({i: 25 for i in order[:n25]})
    snr.update({i: 15 for i in order[n25 : n25 + n15]})

    plans: list[Plan] = []
    for i in range(count):
        split: Literal["seen", "novel"] = (
            "novel" if rng.random() < NOVEL_SHARE else "seen"
        )
        with_entities = rng.random() >= NO_ENTITY_SHARE
        template = rng.choice(pools[(split, with_entities)])
        speaker = rng.choice(speakers)
        liked = scenario.affinity[speaker]
        reference, speak, entities = _fill(rng, template, scenario, liked)
        plans.append(
            Plan(
                id=f"ws-{i + 1:04d}",
                split=split,
                template=template,
                reference=reference,
                speak=speak,
                entities=entities,
                speaker=speaker,
                source=_source(rng, liked),
                voice=VOICES[i % len(VOICES)],
                snr_db=snr[i],
            )
        )
    return plans

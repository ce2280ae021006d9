"""Read a scenario folder: lexicon, speaker affinities, phrasings, recording settings.

A scenario folder (examples/workshop, examples/coldstore, ...) holds `lexicon.csv`,
`speakers.csv`, `train.txt`, `novel_phrasings.txt`, `devices.csv` (which device
stands at which place) and `scenario.yaml` (voices, noise, the parts of its corpus
and the file each part and recogniser is written to).

Also turns a lexicon entry into the text a speech synthesiser should read, since
the written names of people and equipment often mislead a synthesiser's
letter-to-sound rules.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass, field
from fractions import Fraction
from itertools import pairwise
from pathlib import Path
from typing import Any

import yaml

EXAMPLES = Path(__file__).resolve().parent.parent
SLOT = re.compile(r"\{([a-z_]+)\}")
ALLOWED_TEXT = re.compile(r"^[a-z' {}_]+$")

# Rough English respelling for each ARPAbet phone, used only to feed the synthesiser.
PHONE_SPELLING = {
    "AA": "ah",
    "AE": "a",
    "AH": "uh",
    "AO": "aw",
    "AW": "ow",
    "AY": "eye",
    "EH": "eh",
    "ER": "er",
    "EY": "ay",
    "IH": "ih",
    "IY": "ee",
    "OW": "oh",
    "OY": "oy",
    "UH": "oo",
    "UW": "oo",
    "B": "b",
    "CH": "ch",
    "D": "d",
    "DH": "th",
    "F": "f",
    "G": "g",
    "HH": "h",
    "JH": "j",
    "K": "k",
    "L": "l",
    "M": "m",
    "N": "n",
    "NG": "ng",
    "P": "p",
    "R": "r",
    "S": "s",
    "SH": "sh",
    "T": "t",
    "TH": "th",
    "V": "v",
    "W": "w",
    "Y": "y",
    "Z": "z",
    "ZH": "zh",
}
VOWELS = {
    "AA",
    "AE",
    "AH",
    "AO",
    "AW",
    "AY",
    "EH",
    "ER",
    "EY",
    "IH",
    "IY",
    "OW",
    "OY",
    "UH",
    "UW",
}


class ScenarioError(ValueError):
    """A scenario file is malformed; the message names file and line."""


@dataclass(frozen=True)
class Entry:
    id: str
    type: str
    name: str
    aliases: tuple[str, ...] = ()
    say: str = ""
    weight: float = 1.0

    def spoken(self) -> str:
        """What the synthesiser should read for this entry."""
        return say_to_text(self.say) if self.say else self.name


@dataclass
class Scenario:
    entries: list[Entry]
    affinity: dict[str, dict[str, float]] = field(default_factory=dict)

    def by_type(self, kind: str) -> list[Entry]:
        return [e for e in self.entries if e.type == kind]

    def by_id(self) -> dict[str, Entry]:
        return {e.id: e for e in self.entries}


def arpabet_to_text(phones: list[str]) -> str:
    """Split phones into syllables and respell each syllable as a word.

    Between two vowels the first consonant closes the earlier syllable and the
    rest open the next one (one lone consonant opens the next syllable).
    """
    bases: list[str] = []
    for phone in phones:
        base = phone.rstrip("012")
        if base not in PHONE_SPELLING:
            raise ScenarioError(f"unknown ARPAbet phone {phone!r}")
        bases.append(base)
    nuclei = [i for i, base in enumerate(bases) if base in VOWELS]
    if not nuclei:
        return " ".join(PHONE_SPELLING[b] for b in bases)
    cuts = [0]
    for left, right in pairwise(nuclei):
        between = right - left - 1
        cuts.append(left + 1 + (1 if between >= 2 else 0))
    cuts.append(len(bases))
    words = []
    for start, stop in pairwise(cuts):
        word = ""
        for i in range(start, stop):
            if bases[i] == "AY" and word:
                # "s" + "eye" reads badly; "sigh" reads as intended.
                word += "igh"
            else:
                word += PHONE_SPELLING[bases[i]]
        words.append(word)
    return " ".join(words)


def say_to_text(say: str) -> str:
    """A `say` value (respelling or /ARPAbet/) as lowercase words for synthesis."""
    say = say.strip()
    if say.startswith("/") and say.endswith("/"):
        return arpabet_to_text(say.strip("/").split())
    return " ".join(say.replace("-", " ").lower().split())


def check_text(text: str, where: str) -> None:
    """Enforce the corpus text convention: lowercase words, apostrophes, slots."""
    if not ALLOWED_TEXT.match(text):
        raise ScenarioError(f"{where}: only lowercase words, apostrophes and {{slots}} allowed: {text!r}")


def load_lexicon(path: Path) -> list[Entry]:
    entries: list[Entry] = []
    seen: set[str] = set()
    with path.open(encoding="utf-8", newline="") as handle:
        for line_no, row in enumerate(csv.DictReader(handle), start=2):
            where = f"{path}:{line_no}"
            if not row.get("id") or not row.get("type") or not row.get("name"):
                raise ScenarioError(f"{where}: id, type and name are required")
            if row["id"] in seen:
                raise ScenarioError(f"{where}: duplicate id {row['id']!r}")
            seen.add(row["id"])
            check_text(row["name"], where)
            aliases = tuple(a for a in (row.get("aliases") or "").split("|") if a)
            for alias in aliases:
                check_text(alias, where)
            try:
                weight = float(row.get("weight") or 1.0)
            except ValueError as exc:
                raise ScenarioError(f"{where}: weight is not a number") from exc
            entries.append(
                Entry(
                    row["id"],
                    row["type"],
                    row["name"],
                    aliases,
                    row.get("say") or "",
                    weight,
                )
            )
    return entries


def load_affinity(path: Path, known: set[str]) -> dict[str, dict[str, float]]:
    table: dict[str, dict[str, float]] = {}
    with path.open(encoding="utf-8", newline="") as handle:
        for line_no, row in enumerate(csv.DictReader(handle), start=2):
            where = f"{path}:{line_no}"
            if row.get("id") not in known:
                raise ScenarioError(f"{where}: unknown lexicon id {row.get('id')!r}")
            try:
                value = float(row["affinity"])
            except (TypeError, ValueError) as exc:
                raise ScenarioError(f"{where}: affinity is not a number") from exc
            if not 0.0 <= value <= 1.0:
                raise ScenarioError(f"{where}: affinity must be within [0, 1]")
            table.setdefault(row["speaker"], {})[row["id"]] = value
    return table


def load_phrasings(path: Path, types: set[str]) -> list[str]:
    lines: list[str] = []
    for line_no, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        text = raw.strip()
        if not text:
            continue
        check_text(text, f"{path}:{line_no}")
        for slot in SLOT.findall(text):
            if slot not in types:
                raise ScenarioError(f"{path}:{line_no}: slot {{{slot}}} is not a lexicon type")
        lines.append(text)
    return lines


def load_scenario(folder: Path) -> Scenario:
    entries = load_lexicon(folder / "lexicon.csv")
    affinity = load_affinity(folder / "speakers.csv", {e.id for e in entries})
    return Scenario(entries, affinity)


@dataclass(frozen=True)
class Output:
    """Where one part's corpus from one recogniser goes."""

    file: str
    # False only for a corpus written before corpora named their recogniser.
    tag_recogniser: bool = True


@dataclass(frozen=True)
class Part:
    """A block of utterances planned from its own seeded random stream."""

    name: str
    seed: int
    count: int
    first: int  # number of the first utterance id (1 -> <prefix>-0001)
    snr: tuple[tuple[int, float], ...]  # (SNR in dB, share of the part), in drawing order
    outputs: dict[str, Output]


@dataclass(frozen=True)
class Settings:
    folder: Path
    name: str
    id_prefix: str
    voices: tuple[str, ...]
    noise: str  # sox synth noise type for the noise bed
    place_device: dict[str, str]
    roaming: tuple[str, ...]
    home_share: float
    parts: dict[str, Part]


def _share(value: Any, where: str) -> float:
    try:
        share = float(Fraction(str(value)))
    except (ValueError, ZeroDivisionError) as exc:
        raise ScenarioError(f"{where}: share {value!r} is not a number or fraction") from exc
    if not 0.0 <= share <= 1.0:
        raise ScenarioError(f"{where}: share must be within [0, 1]")
    return share


def load_devices(path: Path, known: set[str]) -> dict[str, str]:
    """devices.csv: `place,device`, the device standing at a lexicon place."""
    table: dict[str, str] = {}
    with path.open(encoding="utf-8", newline="") as handle:
        for line_no, row in enumerate(csv.DictReader(handle), start=2):
            if row.get("place") not in known or not row.get("device"):
                raise ScenarioError(f"{path}:{line_no}: need a known lexicon place id and a device")
            table[row["place"]] = row["device"]
    return table


def load_settings(folder: Path, known: set[str] | None = None) -> Settings:
    """scenario.yaml of a scenario folder (see examples/recording/README.md)."""
    path = folder / "scenario.yaml"
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError) as exc:
        raise ScenarioError(f"{path}: {exc}") from exc
    if known is None:
        known = {e.id for e in load_lexicon(folder / "lexicon.csv")}
    try:
        devices = raw["devices"]
        parts: dict[str, Part] = {}
        for name, part in raw["parts"].items():
            where = f"{path}: parts.{name}"
            outputs = {}
            for recogniser, out in part["corpus"].items():
                if isinstance(out, str):
                    outputs[recogniser] = Output(out)
                else:
                    outputs[recogniser] = Output(out["file"], bool(out.get("tag_recogniser", True)))
            parts[name] = Part(
                name=name,
                seed=int(part["seed"]),
                count=int(part["count"]),
                first=int(part.get("first", 1)),
                snr=tuple((int(db), _share(v, where)) for db, v in (part.get("snr") or {}).items()),
                outputs=outputs,
            )
        return Settings(
            folder=folder,
            name=str(raw["name"]),
            id_prefix=str(raw["id_prefix"]),
            voices=tuple(raw["voices"]),
            noise=str(raw.get("noise", "pinknoise")),
            place_device=load_devices(folder / devices["table"], known),
            roaming=tuple(devices["roaming"]),
            home_share=_share(devices.get("home_share", 0.6), f"{path}: devices"),
            parts=parts,
        )
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, ScenarioError):
            raise
        raise ScenarioError(f"{path}: missing or malformed setting ({exc!r})") from exc

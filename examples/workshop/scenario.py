"""Read the workshop scenario files: lexicon, speaker affinities, phrasings.

Also turns a lexicon entry into the text a speech synthesiser should read, since
the written names of members and machines often mislead a synthesiser's
letter-to-sound rules.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass, field
from itertools import pairwise
from pathlib import Path

HERE = Path(__file__).resolve().parent
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
        raise ScenarioError(
            f"{where}: only lowercase words, apostrophes and {{slots}} allowed: {text!r}"
        )


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
    for line_no, raw in enumerate(
        path.read_text(encoding="utf-8").splitlines(), start=1
    ):
        text = raw.strip()
        if not text:
            continue
        check_text(text, f"{path}:{line_no}")
        for slot in SLOT.findall(text):
            if slot not in types:
                raise ScenarioError(
                    f"{path}:{line_no}: slot {{{slot}}} is not a lexicon type"
                )
        lines.append(text)
    return lines


def load_scenario(folder: Path = HERE) -> Scenario:
    entries = load_lexicon(folder / "lexicon.csv")
    affinity = load_affinity(folder / "speakers.csv", {e.id for e in entries})
    return Scenario(entries, affinity)

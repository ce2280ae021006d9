"""Turn a lexicon `say` field into ARPAbet phones.

Two forms: ARPAbet in slashes (``/OW0 K AA1 NG K W OW0/``), taken as given after checking each
phone; or a plain respelling (``oh-KONK-woh``): words separated by spaces, syllables by hyphens,
a syllable in capitals is stressed. Respelled syllables are read with the conventions of
dictionary pronunciation keys: ``ah`` as in father, ``ay`` as in day, ``ee`` as in see, ``eh``
as in bed, ``ih`` as in bit, ``oh`` as in go, ``oo`` as in food, ``ow`` as in now, ``uh`` as in
about, ``eye``/``ye``/final ``y`` as in my (final ``ie`` as in tie), ``zh`` as in vision, a silent final ``e`` making the
vowel before it long (``bride``). A syllable of a nasal or ``l`` alone is syllabic (``m-TEM-boo``). A plain word that also appears in the entry's written name
(``KWIL-an router``) keeps that word's own pronunciation, supplied by the caller.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence

from stages.lexicon.sound.phonetics import is_phone

__all__ = ["RespellError", "parse_say"]

_VOWEL_UNITS: dict[str, tuple[str, ...]] = {
    "eye": ("AY",), "igh": ("AY",), "air": ("EH", "R"), "are": ("EH", "R"), "ear": ("IH", "R"),
    "eer": ("IH", "R"), "our": ("AW", "ER"), "oor": ("UH", "R"), "ah": ("AA",), "aa": ("AA",),
    "ar": ("AA", "R"), "aw": ("AO",), "ay": ("EY",), "ai": ("EY",), "ee": ("IY",), "ea": ("IY",),
    "eh": ("EH",), "er": ("ER",), "ur": ("ER",), "ir": ("ER",), "ih": ("IH",), "oh": ("OW",),
    "oa": ("OW",), "oo": ("UW",), "ou": ("AW",), "ow": ("AW",), "oy": ("OY",), "oi": ("OY",),
    "uh": ("AH",), "uu": ("UH",), "or": ("AO", "R"), "ew": ("Y", "UW"), "a": ("AE",),
    "e": ("EH",), "i": ("IH",), "o": ("AA",), "u": ("AH",),
}
_CONSONANT_UNITS: dict[str, tuple[str, ...]] = {
    "tch": ("CH",), "ch": ("CH",), "sh": ("SH",), "zh": ("ZH",), "th": ("TH",), "dh": ("DH",),
    "kh": ("K",), "ng": ("NG",), "nk": ("NG", "K"), "ph": ("F",), "ck": ("K",), "qu": ("K", "W"),
    "wh": ("W",), "j": ("JH",), "x": ("K", "S"), "c": ("K",), "y": ("Y",), "h": ("HH",),
    "b": ("B",), "d": ("D",), "f": ("F",), "g": ("G",), "k": ("K",), "l": ("L",), "m": ("M",),
    "n": ("N",), "p": ("P",), "r": ("R",), "s": ("S",), "t": ("T",), "v": ("V",), "w": ("W",),
    "z": ("Z",),
}
_LONG = {"a": "EY", "e": "IY", "i": "AY", "o": "OW", "u": "UW"}
_MAGIC_E = re.compile(r"^([^aeiouy]*)([aeiou])([^aeiouy]+)e$")
_SYLLABLE = re.compile(r"^[A-Za-z']+$")
_UNITS = sorted({**_VOWEL_UNITS, **_CONSONANT_UNITS}.items(), key=lambda kv: -len(kv[0]))


class RespellError(ValueError):
    """Raised when a `say` value cannot be read; the message names the offending piece."""


def _stress(phones: list[str], stressed: bool) -> list[str]:
    mark = "1" if stressed else "0"
    return [p + mark if p in _VOWEL_PHONES else p for p in phones]


_VOWEL_PHONES = {p for units in _VOWEL_UNITS.values() for p in units if p not in ("R", "Y")}
_SYLLABIC = {"M", "N", "NG", "L"}  # consonants that can carry a syllable alone


def _syllable(text: str) -> list[str]:
    lower = text.lower().replace("'", "")
    magic = _MAGIC_E.match(lower)
    if magic and len(lower) > 2:
        onset, vowel, coda = magic.groups()
        return _syllable(onset) + [_LONG[vowel]] + _syllable(coda) if onset else [_LONG[vowel]] + _syllable(coda)
    # "ye", "y" or "ie" closing a syllable after a consonant sounds as in "rye", "my", "tie".
    if re.search(r"[^aeiouy](ye|y|ie)$", lower):
        return _syllable(re.sub(r"(ye|y|ie)$", "", lower)) + ["AY"]
    phones: list[str] = []
    position = 0
    while position < len(lower):
        # A doubled consonant letter is one sound (the "ll" of "KAHL-leh" excepted across syllables).
        if position > 0 and lower[position] == lower[position - 1] and lower[position] not in "aeiou":
            position += 1
            continue
        for unit, sound in _UNITS:
            if lower.startswith(unit, position):
                phones.extend(sound)
                position += len(unit)
                break
        else:
            raise RespellError(f"cannot read {lower[position]!r} in syllable {text!r}")
    return phones


def _respelled_word(word: str) -> list[str]:
    phones: list[str] = []
    syllables = [s for s in word.split("-")]
    for syllable in syllables:
        if not _SYLLABLE.match(syllable):
            raise RespellError(f"syllable {syllable!r} in {word!r} must be letters only")
        stressed = syllable.isupper() or len(syllables) == 1
        sounds = _syllable(syllable)
        if sounds and all(p in _SYLLABIC for p in sounds):
            # A nasal or liquid standing as its own syllable ("m-TEM-boo", "n-DAH-ee"): CMUdict
            # writes such syllables with a reduced vowel ("button" B AH1 T AH0 N), and so do we.
            sounds = ["AH", *sounds]
        if not any(p in _VOWEL_PHONES for p in sounds):
            raise RespellError(f"syllable {syllable!r} in {word!r} has no vowel sound")
        phones.extend(_stress(sounds, stressed))
    return phones


def parse_say(say: str, *, name_words: Sequence[str] = (),
              pronounce: Callable[[str], Sequence[str]] | None = None) -> list[str]:
    """ARPAbet phones for a `say` value; RespellError when it cannot be read.

    ``name_words`` are the words of the entry's written form; a plain lower-case word of the
    respelling found among them is pronounced by ``pronounce`` instead of by the respelling rules.
    """
    text = say.strip()
    if not text:
        raise RespellError("is empty")
    if text.startswith("/") or text.endswith("/"):
        if not (len(text) > 2 and text.startswith("/") and text.endswith("/")):
            raise RespellError(f"ARPAbet must be enclosed in slashes: {text!r}")
        phones = text[1:-1].split()
        bad = [p for p in phones if not is_phone(p.upper())]
        if bad or not phones:
            raise RespellError(f"not ARPAbet phones: {', '.join(bad) or 'none given'}")
        return [p.upper() for p in phones]
    phones = []
    known = set(name_words)
    for word in text.split():
        if pronounce is not None and word in known and word.islower() and "-" not in word:
            phones.extend(pronounce(word))
        else:
            phones.extend(_respelled_word(word))
    return phones

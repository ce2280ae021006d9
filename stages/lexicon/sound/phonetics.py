"""ARPAbet phones, their articulatory features, and a feature-weighted phone alignment.

Substitution costs follow the usual phonological intuition (as in feature-based alignment,
e.g. Kondrak 2000, "A new algorithm for the alignment of phonetic sequences"): two phones
that differ only in voicing (P/B, S/Z) or by one step of place are close; a change of manner
costs more, less between a stop and a weak fricative (B/V), and a sibilant for a weak fricative
(V/S) more than its place alone, as listeners confuse them (Miller and Nicely 1955); vowels
are cheap to confuse with each other because recognisers and speakers blur them most; a vowel
for a consonant costs most. Costs lie in [0, 1].
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from stages.lexicon.sound.kernels import compiled

__all__ = [
    "BROAD_CLASSES",
    "BROAD_CODES",
    "CONSONANTS",
    "PHONES",
    "SKELETON_CLASSES",
    "SKELETON_CODES",
    "VOWELS",
    "CostModel",
    "alignment_cost",
    "batch_alignment_cost",
    "batch_similarity",
    "broad",
    "contrast",
    "decode",
    "encode",
    "is_phone",
    "similarity",
    "skeleton",
    "strip_stress",
]

# height 0 low .. 2 high; backness 0 front .. 2 back; rounded; diphthong
_VOWELS: dict[str, tuple[int, int, int, int]] = {
    "IY": (2, 0, 0, 0), "IH": (2, 0, 0, 0), "EY": (1, 0, 0, 1), "EH": (1, 0, 0, 0),
    "AE": (0, 0, 0, 0), "AH": (1, 1, 0, 0), "ER": (1, 1, 0, 0), "AA": (0, 2, 0, 0),
    "AO": (0, 2, 1, 0), "OW": (1, 2, 1, 1), "UH": (2, 2, 1, 0), "UW": (2, 2, 1, 0),
    "AY": (0, 1, 0, 1), "AW": (0, 1, 1, 1), "OY": (1, 2, 1, 1),
}
# place: 0 bilabial 1 labiodental 2 dental 3 alveolar 4 postalveolar 5 palatal 6 velar 7 glottal
# manner: stop, affricate, fricative, nasal, lateral, rhotic, glide
_CONSONANTS: dict[str, tuple[int, str, int]] = {
    "P": (0, "stop", 0), "B": (0, "stop", 1), "T": (3, "stop", 0), "D": (3, "stop", 1),
    "K": (6, "stop", 0), "G": (6, "stop", 1), "CH": (4, "affricate", 0), "JH": (4, "affricate", 1),
    "F": (1, "fricative", 0), "V": (1, "fricative", 1), "TH": (2, "fricative", 0),
    "DH": (2, "fricative", 1), "S": (3, "fricative", 0), "Z": (3, "fricative", 1),
    "SH": (4, "fricative", 0), "ZH": (4, "fricative", 1), "HH": (7, "fricative", 0),
    "M": (0, "nasal", 1), "N": (3, "nasal", 1), "NG": (6, "nasal", 1), "L": (3, "lateral", 1),
    "R": (3, "rhotic", 1), "W": (0, "glide", 1), "Y": (5, "glide", 1),
}
VOWELS = frozenset(_VOWELS)
CONSONANTS = frozenset(_CONSONANTS)
PHONES: tuple[str, ...] = tuple(sorted(VOWELS | CONSONANTS))
_INDEX = {phone: i for i, phone in enumerate(PHONES)}
# Manner pairs that sound alike: a stop and the affricate or fricative made at the same spot.
_NEAR_MANNERS = {frozenset({"stop", "affricate"}), frozenset({"affricate", "fricative"}),
                 frozenset({"lateral", "rhotic"}), frozenset({"rhotic", "glide"}),
                 frozenset({"lateral", "glide"})}
# The weak (non-sibilant) fricatives: a stop for one of them is a near change of manner (Miller and
# Nicely 1955 find B/V, B/DH, P/F, D/DH and T/TH confused 8-21% of the time in noise, a stop and
# a weak fricative 10% on average against 7% for a stop and a sibilant). Between fricatives and
# affricates, a hiss for no hiss (V/S: 2%, against V/DH: 34%) costs more than place alone says.
_WEAK = frozenset({"F", "V", "TH", "DH"})
_SIBILANTS = frozenset({"S", "Z", "SH", "ZH", "CH", "JH"})
_HISSING = frozenset({"fricative", "affricate"})
# Vowel/consonant pairs that are nearly the same sound.
_CROSS = {frozenset({"ER", "R"}): 0.3, frozenset({"IY", "Y"}): 0.4, frozenset({"UW", "W"}): 0.4,
          frozenset({"AH", "L"}): 0.8, frozenset({"AH", "R"}): 0.7}
_CHAR_BASE = 0x100  # phones become one character each, so strings of phones work with rapidfuzz


def strip_stress(phone: str) -> str:
    return phone.rstrip("012")


def is_phone(phone: str) -> bool:
    """True for an ARPAbet phone, with or without a stress digit on a vowel."""
    bare = strip_stress(phone)
    if bare != phone and (bare not in VOWELS or len(phone) != len(bare) + 1):
        return False
    return bare in _INDEX


def encode(phones: Sequence[str]) -> str:
    """A phone sequence as a string, one character per phone (stress removed)."""
    return "".join(chr(_CHAR_BASE + _INDEX[strip_stress(p)]) for p in phones)


# Broad classes for retrieval: every vowel one vowel, voiced and voiceless partners one consonant.
# Recognisers blur vowels and voicing first ("hell sire" for halcyra), so strings that share
# their broad-class n-grams are worth aligning even when their exact phone n-grams differ.
_BROAD = {**{v: "AH" for v in _VOWELS}, "B": "P", "D": "T", "G": "K", "JH": "CH", "V": "F", "DH": "TH",
          "Z": "S", "ZH": "SH"}


def _classes(mapping: dict[str, str]) -> tuple[tuple[str, ...], dict[int, str | None]]:
    """The classes ``mapping`` sends the phones to (a phone it leaves out is its own; "" drops it),
    and a ``str.translate`` table writing each phone as its class's symbol. Each class is a symbol
    of its own alphabet, numbered from _CHAR_BASE like the phones, so an index over such strings
    needs a lookup table for that many symbols, not 39."""
    classes = tuple(sorted({mapping.get(p, p) for p in PHONES} - {""}))
    table = str.maketrans({chr(_CHAR_BASE + _INDEX[p]): (chr(_CHAR_BASE + classes.index(mapping.get(p, p)))
                                                         if mapping.get(p, p) else None) for p in PHONES})
    return classes, table


def _class_codes(table: dict[int, str | None]) -> npt.NDArray[np.int32]:
    """``table`` as the compiled index search reads it: each phone's class number, -1 if dropped."""
    return np.array([-1 if (to := table[_CHAR_BASE + i]) is None else ord(to) - _CHAR_BASE
                     for i in range(len(PHONES))], dtype=np.int32)


BROAD_CLASSES, _BROAD_CHARS = _classes(_BROAD)  # 17 symbols
BROAD_CODES = _class_codes(_BROAD_CHARS)


# The consonant skeleton: vowels and h left out (schwas come and go: "chandlery" heard as
# "chandelry"), ER read as R, voicing ignored, and the four hushing sounds (CH JH SH ZH) as one.
_SKELETON = {**{v: "" for v in _VOWELS}, "ER": "R", "HH": "", "B": "P", "D": "T", "G": "K", "V": "F",
             "DH": "TH", "Z": "S", "JH": "SH", "CH": "SH", "ZH": "SH"}
SKELETON_CLASSES, _SKELETON_CHARS = _classes(_SKELETON)  # 14 symbols
SKELETON_CODES = _class_codes(_SKELETON_CHARS)


def broad(text: str) -> str:
    """An encoded phone string in broad classes (see ``_BROAD``): one symbol per phone, numbered
    from ``_CHAR_BASE`` in ``BROAD_CLASSES``."""
    return text.translate(_BROAD_CHARS)


def skeleton(text: str) -> str:
    """An encoded phone string's consonant skeleton (see ``_SKELETON``): a symbol per consonant
    kept, numbered from ``_CHAR_BASE`` in ``SKELETON_CLASSES``."""
    return text.translate(_SKELETON_CHARS)


def decode(text: str) -> list[str]:
    return [PHONES[ord(ch) - _CHAR_BASE] for ch in text]


def _substitution(a: str, b: str) -> float:
    if a == b:
        return 0.0
    if a in VOWELS and b in VOWELS:
        ha, ba, ra, da = _VOWELS[a]
        hb, bb, rb, db = _VOWELS[b]
        cost = 0.15 + 0.1 * abs(ha - hb) + 0.08 * abs(ba - bb) + 0.06 * (ra != rb) + 0.08 * (da != db)
        return min(cost, 0.55)
    if a in CONSONANTS and b in CONSONANTS:
        pa, ma, va = _CONSONANTS[a]
        pb, mb, vb = _CONSONANTS[b]
        cost = 0.2 * (va != vb) + min(0.08 * abs(pa - pb), 0.35)
        if ma != mb:
            near = frozenset({ma, mb}) in _NEAR_MANNERS or ({ma, mb} == {"stop", "fricative"} and bool({a, b} & _WEAK))
            cost += 0.3 if near else 0.55
        if ma in _HISSING and mb in _HISSING and (a in _SIBILANTS) != (b in _SIBILANTS):
            cost += 0.2
        return min(max(cost, 0.15), 1.0)
    return _CROSS.get(frozenset({a, b}), 1.0)


def contrast(a: str, b: str) -> str:
    """What tells two consonants apart, by the feature table: nasality, voicing only, voicing (and
    more), place only, or place and manner; the classes of published consonant confusion tables."""
    (place_a, manner_a, voiced_a), (place_b, manner_b, voiced_b) = _CONSONANTS[a], _CONSONANTS[b]
    if (manner_a == "nasal") != (manner_b == "nasal"):
        return "nasality"
    if voiced_a != voiced_b:
        return "voicing only" if (place_a, manner_a) == (place_b, manner_b) else "voicing"
    return "place only" if manner_a == manner_b else "place and manner"


def _indel(phone: str) -> float:
    if phone in ("AH", "HH"):
        return 0.35  # schwa and h come and go with speaking rate and accent
    if phone in VOWELS:
        return 0.5
    return 0.7


@dataclass(frozen=True, slots=True)
class CostModel:
    """Costs of aligning a heard phone string with a said one, indexed by phone number (see ``encode``).

    The aligners take the heard string first (``a``: a span of the N-best) and the said one
    second (``b``: a lexicon form). ``substitution[x][y]`` is the cost of heard phone x standing
    for said phone y, ``insertion[x]`` of a heard phone x that stands for nothing said, and
    ``deletion[y]`` of a said phone y that was not heard. The hand costs (``features``) are
    symmetric; costs learned from a recogniser (``stages.lexicon.sound.costfile``) need not be.
    """

    substitution: tuple[tuple[float, ...], ...]
    insertion: tuple[float, ...]
    deletion: tuple[float, ...]
    # The same costs as arrays with one extra padding phone (index len(PHONES)) that costs nothing.
    sub_array: npt.NDArray[np.float32] = field(init=False, repr=False, compare=False)
    insertion_array: npt.NDArray[np.float32] = field(init=False, repr=False, compare=False)
    deletion_array: npt.NDArray[np.float32] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        size = len(PHONES) + 1
        sub = np.zeros((size, size), dtype=np.float32)
        sub[:-1, :-1] = np.asarray(self.substitution, dtype=np.float32)
        object.__setattr__(self, "sub_array", sub)
        for name, values in (("insertion_array", self.insertion), ("deletion_array", self.deletion)):
            padded = np.zeros(size, dtype=np.float32)
            padded[:-1] = np.asarray(values, dtype=np.float32)
            object.__setattr__(self, name, padded)

    @classmethod
    def features(cls) -> CostModel:
        indel = tuple(_indel(p) for p in PHONES)
        return cls(tuple(tuple(_substitution(a, b) for b in PHONES) for a in PHONES), indel, indel)

    @classmethod
    def unit(cls) -> CostModel:
        """Levenshtein costs: 1 for any edit. Used to check the aligner against reference tools."""
        ones = tuple(1.0 for _ in PHONES)
        return cls(tuple(tuple(float(a != b) for b in PHONES) for a in PHONES), ones, ones)

    def cost(self, heard: str, said: str) -> float:
        return self.substitution[_INDEX[strip_stress(heard)]][_INDEX[strip_stress(said)]]


def alignment_cost(a: str, b: str, model: CostModel) -> float:
    """Least total cost of turning encoded phone string ``a`` (heard) into ``b`` (said): a weighted
    edit distance, ``a``'s phones left over costing ``model.insertion``, ``b``'s ``model.deletion``."""
    sub, inserted, deleted = model.substitution, model.insertion, model.deletion
    xs = [ord(ch) - _CHAR_BASE for ch in a]
    ys = [ord(ch) - _CHAR_BASE for ch in b]
    previous = [0.0]
    for y in ys:
        previous.append(previous[-1] + deleted[y])
    for x in xs:
        row_sub = sub[x]
        drop = inserted[x]
        current = [previous[0] + drop]
        left = current[0]
        for j, y in enumerate(ys):
            best = previous[j] + row_sub[y]
            up = previous[j + 1] + drop
            best = min(best, up)
            side = left + deleted[y]
            best = min(best, side)
            current.append(best)
            left = best
        previous = current
    return previous[-1]


def similarity(a: str, b: str, model: CostModel) -> float:
    """1 - alignment cost over the longer length, clipped to [0, 1]; 1 means the same phones."""
    longest = max(len(a), len(b))
    if longest == 0:
        return 1.0
    return max(0.0, 1.0 - alignment_cost(a, b, model) / longest)


def _codes(strings: Sequence[str]) -> tuple[npt.NDArray[np.int16], npt.NDArray[np.int64]]:
    lengths = np.fromiter((len(s) for s in strings), dtype=np.int64, count=len(strings))
    width = int(lengths.max(initial=0))
    codes = np.full((len(strings), width), len(PHONES), dtype=np.int16)
    flat = np.frombuffer("".join(strings).encode("utf-32-le"), dtype=np.uint32).astype(np.int64) - _CHAR_BASE
    rows = np.repeat(np.arange(len(strings)), lengths)
    columns = np.arange(len(flat)) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    codes[rows, columns] = flat
    return codes, lengths


def batch_alignment_cost(a: Sequence[str], b: Sequence[str], model: CostModel) -> npt.NDArray[np.float32]:
    """``alignment_cost(a[i], b[i])`` for every i at once, in float32.

    The compiled kernel (stages/kernels.py) runs the recurrence below pair by pair with the
    same float32 operations in the same order, so both give the same bits.
    """
    if compiled is not None:
        return _batch_alignment_cost_compiled(a, b, model)
    return _batch_alignment_cost_numpy(a, b, model)


def _batch_alignment_cost_compiled(a: Sequence[str], b: Sequence[str], model: CostModel) -> npt.NDArray[np.float32]:
    if compiled is None:
        raise RuntimeError("the compiled kernels are not built")
    if len(a) != len(b):
        raise ValueError("batch_alignment_cost needs as many strings in a as in b")
    out = np.empty(len(a), dtype=np.float32)
    compiled.alignment_costs(a, b, model.sub_array, model.insertion_array, model.deletion_array, len(PHONES) + 1,
                             _CHAR_BASE, out)
    return out


def _batch_alignment_cost_numpy(a: Sequence[str], b: Sequence[str], model: CostModel) -> npt.NDArray[np.float32]:
    """The batch alignment with numpy.

    The dynamic programme runs row by row (one row per phone of ``a``), vectorised over the
    pairs and the columns: a row is first filled from the row above (substitute or delete),
    then insertions along the row are resolved with a running minimum, since
    D[j] = min over j' <= j of (T[j'] + ins(j'+1..j)) = C[j] + min(T[j'] - C[j']) with C the
    cumulative insertion cost. Padding phones cost nothing and sit past each string's end.
    Pairs are sorted by the length of ``a``, so row i works on a prefix of them (those still
    running) and writes into reused buffers: the work is per-call overhead more than arithmetic.
    """
    if not len(a):
        return np.zeros(0, dtype=np.float32)
    xs, x_len = _codes(a)
    ys, y_len = _codes(b)
    order = np.argsort(-x_len, kind="stable")
    xs, x_len, ys, y_len = xs[order], x_len[order], ys[order], y_len[order]
    pairs, columns = ys.shape
    ins = model.deletion_array[ys]  # pairs x columns: a said phone left unheard
    cum_ins = np.concatenate([np.zeros((pairs, 1), np.float32), np.cumsum(ins, axis=1)], axis=1)
    row = cum_ins.copy()
    out = np.where(x_len == 0, row[np.arange(pairs), y_len], 0.0).astype(np.float32)
    drops = model.insertion_array[xs]  # a heard phone standing for nothing said
    # running[i]: how many pairs have more than i phones in a (a prefix of the sorted pairs)
    running = np.searchsorted(-x_len, -np.arange(1, xs.shape[1] + 2), side="right").tolist()
    through = np.empty_like(row)
    step = np.empty((pairs, columns), np.float32)
    for i in range(xs.shape[1]):
        n = running[i]
        r, t, drop = row[:n], through[:n], drops[:n, i, None]
        np.add(r, drop, out=t)  # leave the phone of a unmatched
        if columns:
            np.add(r[:, :-1], model.sub_array[xs[:n, i, None], ys[:n]], out=step[:n])
            np.minimum(step[:n], t[:, 1:], out=t[:, 1:])
        np.subtract(t, cum_ins[:n], out=t)
        np.minimum.accumulate(t, axis=1, out=r)
        r += cum_ins[:n]
        finished = running[i + 1]  # pairs [finished, n) end at this row
        if finished < n:
            out[finished:n] = r[np.arange(finished, n), y_len[finished:n]]
    result = np.empty_like(out)
    result[order] = out
    return result


def batch_similarity(a: Sequence[str], b: Sequence[str], model: CostModel) -> npt.NDArray[np.float32]:
    """``similarity`` for every pair at once."""
    costs = batch_alignment_cost(a, b, model)
    longest = np.maximum(np.fromiter(map(len, a), np.float32, len(a)), np.fromiter(map(len, b), np.float32, len(b)))
    return np.clip(1.0 - costs / np.maximum(longest, 1.0), 0.0, 1.0).astype(np.float32)

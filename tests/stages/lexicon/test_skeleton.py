"""The consonant-skeleton index: a third way from a heard span to a lexicon form.

A recogniser that puts a vowel into a name or takes one out ("chandlery" written as
"chandelry") and hears a hushing sound for another changes most of the span's phone 3- and
4-grams, so neither the phone index nor the broad-class index offers the form, however close
the alignment finds the two. Their consonant skeletons are the same.
"""

from __future__ import annotations

import pytest

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import CompiledLexicon, compile_entries
from stages.lexicon.data import LexiconEntry
from stages.lexicon.match import Weights, find_spans, score_spans
from stages.lexicon.sound.phonetics import PHONES, SKELETON_CLASSES, VOWELS, CostModel, encode, skeleton
from stages.lexicon.sound.pronounce import Pronouncer


def test_skeleton_keeps_consonants_merges_voicing_and_hushing_sounds() -> None:
    # Worked by hand from the mapping: vowels and HH go, ER is read as R, voiced consonants as
    # their voiceless partners, CH/JH/ZH as SH.
    said = encode(["DH", "AH", "CH", "AE", "N", "D", "L", "ER", "IY"])
    heard = encode(["DH", "AH", "SH", "AE", "N", "D", "AH", "L", "R", "IY"])
    assert [SKELETON_CLASSES[ord(ch) - 0x100] for ch in skeleton(said)] == ["TH", "SH", "N", "T", "L", "R"]
    assert skeleton(said) == skeleton(encode(["TH", "SH", "N", "T", "L", "R"]))
    assert skeleton(heard) == skeleton(said)
    assert skeleton(encode(["HH", "AW", "S", "JH", "IY", "Z"])) == skeleton(encode(["S", "SH", "S"]))
    assert skeleton(encode(["AH", "IY"])) == ""


def test_every_phone_has_its_skeleton_symbol_and_every_symbol_a_phone() -> None:
    # Worked by hand from the description: voiced consonants as their voiceless partners, the
    # hushing sounds as SH, ER as R; vowels and HH leave nothing; every other consonant is itself.
    partner = {"B": "P", "D": "T", "G": "K", "V": "F", "DH": "TH", "Z": "S", "JH": "SH", "CH": "SH", "ZH": "SH",
               "ER": "R"}
    reached = set()
    for phone in PHONES:
        written = skeleton(encode([phone]))
        if (phone in VOWELS and phone != "ER") or phone == "HH":
            assert written == "", phone
            continue
        assert len(written) == 1, phone
        symbol = SKELETON_CLASSES[ord(written) - 0x100]
        assert symbol == partner.get(phone, phone), phone
        reached.add(symbol)
    assert reached == set(SKELETON_CLASSES)  # the alphabet holds no symbol that no phone is written as


@pytest.fixture(scope="module")
def lexicon() -> CompiledLexicon:
    names = ["the chandlery", "the sander", "the generator", "the slipway", "the sail loft", "the hard standing",
             "the fuel dock", "the chandler", "the cradle", "the cherry picker"]
    entries = [LexiconEntry(f"e{i}", "place", name, (), None, 1.0, i + 2) for i, name in enumerate(names)]
    return compile_entries(entries, Pronouncer(), max_postings=60)


def _pairs(lexicon: CompiledLexicon, heard: str, skeleton_candidates: int) -> dict[str, float]:
    tokens = heard.split()
    spans = find_spans([Hypothesis(heard, 0, {}, tokens=tokens, posterior=1.0)], lexicon.max_words + 1, Pronouncer())
    weights = Weights(0.6, 0.2, 0.2, 3, 0.2, 0.45, 0.6, 0.4, broad_candidates=3, broad_min_retrieval=0.2,
                      skeleton_candidates=skeleton_candidates, skeleton_min_retrieval=0.6)
    found: dict[str, float] = {}
    for q, f, score, _ in score_spans(spans, lexicon, weights, CostModel.features()):
        if spans.texts[q] == heard:
            found[lexicon.forms[f].text] = max(score, found.get(lexicon.forms[f].text, 0.0))
    return found


def test_a_vowel_put_in_is_found_through_the_skeleton_only(lexicon: CompiledLexicon) -> None:
    pronouncer = Pronouncer()
    said, heard = pronouncer.words(["the", "chandlery"]), pronouncer.words(["the", "chandelry"])
    # Both spellings go through the shipped G2P model; the test needs what it says of them:
    # a vowel more in the heard one and another hushing sound, one skeleton.
    assert len(heard) > len(said) and skeleton(heard) == skeleton(said) and heard[:2] == said[:2]
    without = _pairs(lexicon, "the chandelry", 0)
    with_skeleton = _pairs(lexicon, "the chandelry", 3)
    assert "the chandlery" not in without
    assert with_skeleton["the chandlery"] > max(without.values(), default=0.0)
    assert set(without) <= set(with_skeleton)  # a way in more, nothing taken away

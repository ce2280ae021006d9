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
from stages.lexicon.sound.phonetics import SKELETON_CLASSES, CostModel, encode, skeleton
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


# Minimal pairs, pronounced by CMUdict (the Pronouncer's dictionary): the skeleton must merge
# what a recogniser swaps freely (voicing, vowels, HH, the hushing sounds, ER against a vowel and
# R) and keep apart consonants that differ in place or manner.
SAME_SKELETON = [("bat", "pat"), ("sip", "zip"), ("fan", "van"), ("thin", "then"), ("chip", "ship"),
                 ("jeep", "sheep"), ("bit", "bought"), ("hat", "at"), ("fur", "far")]
OTHER_SKELETON = [("pat", "cat"), ("tin", "kin"), ("sip", "ship"), ("map", "nap"), ("lip", "rip"), ("fan", "than")]


@pytest.mark.parametrize("a, b", SAME_SKELETON)
def test_minimal_pairs_a_recogniser_confuses_share_a_skeleton(a: str, b: str) -> None:
    pronouncer = Pronouncer()
    assert pronouncer.in_dictionary(a) and pronouncer.in_dictionary(b)
    assert pronouncer.word(a) != pronouncer.word(b) and skeleton(pronouncer.word(a)) == skeleton(pronouncer.word(b))


@pytest.mark.parametrize("a, b", OTHER_SKELETON)
def test_consonants_of_another_place_or_manner_keep_skeletons_apart(a: str, b: str) -> None:
    pronouncer = Pronouncer()
    assert pronouncer.in_dictionary(a) and pronouncer.in_dictionary(b)
    assert skeleton(pronouncer.word(a)) != skeleton(pronouncer.word(b))


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

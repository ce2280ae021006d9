"""Word edits to the nearest in-domain line."""

from __future__ import annotations

import random

import jiwer
import pytest
from rapidfuzz.distance import Levenshtein

from stages.indomain.carriers import marked_lines
from stages.indomain.nearest_line import NearestLine

LINES = [
    "tell {person} the {machine} is free",
    "book the {machine} for {person} at three",
    "call {person}",
    "meet me in {place}",
]


def _jiwer_edits(reference: str, hypothesis: str) -> int:
    # Reference library: jiwer's word alignment (substitutions + deletions + insertions).
    out = jiwer.process_words(reference, hypothesis)
    return out.substitutions + out.deletions + out.insertions


def test_a_line_itself_is_zero_edits_and_a_changed_word_one() -> None:
    near = NearestLine(line.split() for line in LINES)
    assert len(near) == 4
    assert near.edits("tell {person} the {machine} is free".split()) == 0
    assert near.edits("tell {person} the {machine} is broken".split()) == 1  # one substitution
    assert near.edits("call {person} please".split()) == 1  # one insertion
    assert near.edits("meet in {place}".split()) == 1  # one deletion


def test_two_unknown_words_never_match_each_other() -> None:
    near = NearestLine([["xx", "yy"]])
    # "aa" and "bb" are both outside the lines' words; each is its own word: two substitutions.
    assert near.edits(["aa", "bb"]) == 2
    assert near.edits(["aa", "aa"]) == 2
    assert near.edits(["xx", "aa"]) == 1


def test_no_lines_means_unknown() -> None:
    assert NearestLine([]).edits(["call", "{person}"]) is None


@pytest.mark.parametrize("seed", [7, 11])
def test_matches_jiwer_on_random_texts(seed: int) -> None:
    # Edits from jiwer's alignment to every line; the missing slots of the nearest lines counted
    # here, the fewest among lines as near.
    rng = random.Random(seed)
    vocabulary = sorted({w for line in LINES for w in line.split()} | {"now", "shown", "three", "lathe"})
    near = NearestLine(line.split() for line in LINES)
    for _ in range(300):
        words = [rng.choice(vocabulary) for _ in range(rng.randint(1, 9))]
        distances = {line: _jiwer_edits(line, " ".join(words)) for line in LINES}
        best = min(distances.values())
        markers = sum(w.startswith("{") for w in words)
        missing = min(max(0, sum(w.startswith("{") for w in line.split()) - markers)
                      for line, d in distances.items() if d == best)
        assert near.edits(words) == best, words
        assert near.nearest(words)[:2] == (best, missing), words


def test_own_share_is_each_lines_word_error_rate_to_its_nearest_other_line_per_jiwer() -> None:
    # Reference library: jiwer's WER of a line (reference) against another (hypothesis) is its
    # word edits per word of the line; the share is the mean, over the distinct lines, of the
    # least such rate to any other line.
    lines = [*LINES, "tell {person} the {machine} is broken", "meet me in {place}", "call {person} now please"]
    distinct = list(dict.fromkeys(lines))
    expected = sum(min(jiwer.wer(line, other) for other in distinct if other != line) for line in distinct) / len(distinct)
    assert NearestLine(line.split() for line in lines).own_share() == pytest.approx(expected)
    # Worked by hand on two lines: "call {person}" is one insertion from "call {person} now"
    # (1 of 2 words) and that line one deletion from it (1 of 3): (1/2 + 1/3) / 2.
    assert NearestLine([["call", "{person}"], ["call", "{person}", "now"]]).own_share() == pytest.approx(5 / 12)
    assert NearestLine([["call", "{person}"]]).own_share() is None


def test_own_share_of_many_lines_is_taken_over_an_even_sample_of_them() -> None:
    rng = random.Random(5)
    words = [f"w{i}" for i in range(40)]
    lines = [[rng.choice(words) for _ in range(rng.randint(2, 7))] for _ in range(600)]
    distinct = [list(line) for line in dict.fromkeys(tuple(line) for line in lines)]
    # Reference library: rapidfuzz's Levenshtein distance over the word lists themselves, each
    # line against every other, the least per word of it, averaged over the distinct lines.
    whole = sum(min(Levenshtein.distance(line, other) for other in distinct if other is not line) / len(line)
                for line in distinct) / len(distinct)
    near = NearestLine(lines)
    assert near.own_share(most=len(distinct)) == pytest.approx(whole)
    # Each sampled line is still measured against every line, so the sample's mean stays near
    # the whole mean (measured: within 0.01 here), not the larger distances of a thinner text.
    sampled = near.own_share(most=150)
    assert sampled is not None and abs(sampled - whole) < 0.03


def test_missing_slots_are_the_nearest_lines_slots_beyond_the_texts_entities() -> None:
    near = NearestLine(line.split() for line in LINES)
    # Worked by hand: "tell the lathe is free" is two edits from "tell {person} the {machine} is
    # free" ({person} left out, "lathe" for {machine}), and further from every other line.
    assert near.nearest("tell the lathe is free".split()) == (2, 2, "person", 0)
    assert near.nearest("tell {person} the lathe is free".split()) == (1, 1, "machine", 0)
    assert near.nearest("call {person}".split()) == (0, 0, None, 0)
    assert near.nearest("meet me in there".split()) == (1, 1, "place", 0)
    # More entities than the line has slots is not a missing slot; the one of a type the line has
    # no slot for is foreign.
    assert near.nearest("meet {person} in {place}".split()) == (1, 0, None, 1)
    assert NearestLine([]).nearest(["call", "{person}"]) is None


def test_an_entity_of_a_type_the_nearest_line_has_no_slot_for_is_foreign() -> None:
    near = NearestLine(line.split() for line in LINES)
    # Worked by hand: a place where the line holds a machine ("the slip" for a vessel's name) is
    # one substitution from "tell {person} the {machine} is free". Missing slots count slots
    # beyond the number of entities (none here); the place is foreign to the line.
    assert near.nearest("tell {person} the {place} is free".split()) == (1, 0, None, 1)
    assert near.nearest("tell {person} the {machine} is free".split()).foreign == 0  # type: ignore[union-attr]


def test_missing_slots_take_the_fewest_among_equally_near_lines() -> None:
    near = NearestLine([["call", "{person}"], ["call", "now"]])
    # "call him" is one substitution from both lines; one of them has no slot to miss.
    assert near.nearest(["call", "him"]) == (1, 0, None, 0)


def test_names_in_literal_lines_count_as_their_slot() -> None:
    lines = marked_lines([("t:1", "is the kiln on".split()), ("t:2", "is the {machine} on".split()),
                          ("t:3", "meet me in bay one".split())],
                         {"machine": ["kiln"], "place": ["bay one"]})
    assert [tokens for _, tokens in lines] == [("is", "the", "{machine}", "on"), ("meet", "me", "in", "{place}")]
    assert [where for where, _ in lines] == ["t:1", "t:3"]  # a repeat after marking is kept once


@pytest.mark.parametrize("count", [7000, 70000])
def test_large_vocabularies_stay_distinct(count: int) -> None:
    # Past the 16-bit range and the surrogate block, codes stay one per word.
    near = NearestLine([[f"w{i}" for i in range(count)]])
    assert near.edits([f"w{i}" for i in range(count)]) == 0
    assert near.edits([f"w{i}" for i in range(count - 1)] + ["other"]) == 1

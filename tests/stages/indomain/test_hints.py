"""Hints and anchors read off in-domain lines."""

from __future__ import annotations

from stages.indomain.hints import slot_neighbours

LINES = [
    "call {person} now".split(), "please call {person}".split(), "page {person}".split(),
    "book the {machine} for {person}".split(), "is the {machine} free".split(),
    "put it in the {place}".split(), "turn on the {machine}".split(), "{machine} is jammed".split(),
    "call {person} now".split(),  # a repeated line counts once
]


def test_a_word_before_one_type_only_is_its_hint() -> None:
    neighbours = slot_neighbours(LINES)
    assert neighbours.before["call"]["person"] == 2  # the repeated line is one line
    assert neighbours.hints(min_count=2, min_share=0.6) == {"machine": ["the"], "person": ["call"]}
    assert neighbours.hints(min_count=1, min_share=0.6) == {"machine": ["the"], "person": ["call", "for", "page"]}


def test_anchors_are_where_a_type_usually_begins() -> None:
    neighbours = slot_neighbours(LINES)
    # "the" stands before 3 of the 4 machine slots and 1 of 1 place slot.
    assert neighbours.anchors(min_count=1, min_share=0.5) == {"machine": ["the"], "person": ["call"], "place": ["the"]}
    assert neighbours.start_share("machine") == 0.25
    assert neighbours.start_share("vessel") == 0.0

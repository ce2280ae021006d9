"""Carrier phrases: in-domain templates that reveal a slot no entity fills."""

from __future__ import annotations

from pathlib import Path

import pytest

from relay.core.errors import InputError
from stages.indomain.carriers import CarrierPhrases
from stages.normalize.tokens import tokenize

LINES = [
    "let {person} know the {machine} is ready",
    "meet me in {place}",
    "who has the chuck key",
    "is the {machine} on",
    "call {person}",  # one carrier word: too little to tell a slot from a sentence
    "set a timer for twenty minutes",
]
VALUES = {"term": ["chuck key"], "machine": ["tamsin lathe", "kiln"], "place": ["bay one"]}


def phrases(lines: list[str] = LINES, **options: int) -> CarrierPhrases:
    templates = []
    for number, line in enumerate(lines, start=1):
        tokens = []
        for piece in line.split():
            tokens += [piece] if piece.startswith("{") else tokenize(piece)
        templates.append((f"train.txt:{number}", tokens))
    return CarrierPhrases(templates, slot_values=VALUES, **options)


def test_a_slot_held_by_everyday_words_is_reported_with_its_type_and_words() -> None:
    found = phrases().unfilled("let tomatoes hello know the {machine} is ready".split())
    assert found is not None
    assert (found.type, found.words, found.where) == ("person", "tomatoes hello", "train.txt:1")
    assert (found.start, found.end) == (1, 3)  # the slot's tokens
    assert found.template == "let {person} know the {machine} is ready"


def test_every_empty_slot_of_the_match_is_reported_in_text_order() -> None:
    found = phrases().empty_slots("let tomatoes hello know the people through is ready".split())
    assert [(f.type, f.words, f.start, f.end) for f in found] == [
        ("person", "tomatoes hello", 1, 3), ("machine", "people through", 5, 7)]
    assert phrases().empty_slots("let {person} know the people through is ready".split())[0].type == "machine"
    assert phrases().empty_slots("let {person} know the {machine} is ready".split()) == []


def test_every_slot_filled_by_an_entity_reports_nothing() -> None:
    assert phrases().unfilled("let {person} know the {machine} is ready".split()) is None
    assert phrases().unfilled("meet me in {place}".split()) is None


def test_carrier_words_must_match_exactly() -> None:
    assert phrases().unfilled("let tomatoes hello no the {machine} is ready".split()) is None
    assert phrases().unfilled("meet me at they won".split()) is None


def test_names_in_literal_lines_become_slots() -> None:
    # "who has the chuck key" is written out in the text; the lexicon says "chuck key" is a term.
    found = phrases().unfilled("who has the chunky".split())
    assert found is not None and (found.type, found.words) == ("term", "chunky")
    assert phrases().unfilled("who has the {term}".split()) is None


def test_a_text_that_a_filled_template_explains_reports_nothing() -> None:
    # "is the kettle on" fits "is the {machine} on" with a kettle in the slot ...
    assert phrases().unfilled("is the kettle on".split()).type == "machine"  # type: ignore[union-attr]
    # ... but a line without slots explains a sentence it matches word for word.
    assert phrases().unfilled("set a timer for twenty minutes".split()) is None


def test_short_templates_and_long_slots_are_left_out() -> None:
    assert phrases().unfilled("call the duties to word".split()) is None  # "call {person}": one carrier word
    assert len(phrases()) == 5
    many = "let a b c d e f know the {machine} is ready".split()
    assert phrases().unfilled(many) is None  # six words: longer than max_slot_words
    assert phrases(max_slot_words=6).unfilled(many) is not None


def test_marked_replaces_entity_spans_by_their_type() -> None:
    text = "Let Tomatoes know the tamsin lathe is ready"
    start = text.index("tamsin")
    assert CarrierPhrases.marked(text, [(start, start + len("tamsin lathe"), "machine")]) == \
        "let tomatoes know the {machine} is ready".split()


def test_from_files_reads_slots_and_the_lexicon(tmp_path: Path) -> None:
    (tmp_path / "train.txt").write_text("meet me in {place}\nwho has the chuck key\n")
    (tmp_path / "lexicon.csv").write_text("id,type,name,aliases,say,weight\nterm.chuck_key,term,chuck key,,,1.0\n")
    loaded = CarrierPhrases.from_files(tmp_path / "train.txt", tmp_path / "lexicon.csv")
    assert loaded.unfilled("who has the chunky".split()).type == "term"  # type: ignore[union-attr]
    assert loaded.unfilled("meet me in day one".split()).words == "day one"  # type: ignore[union-attr]
    bare = CarrierPhrases.from_files(tmp_path / "train.txt")
    assert bare.unfilled("who has the chunky".split()) is None  # no lexicon: the line stays literal


def test_a_bad_line_is_reported_with_file_and_line(tmp_path: Path) -> None:
    path = tmp_path / "train.txt"
    path.write_text("meet me in {place}\nstart <s> here\n")
    with pytest.raises(InputError, match=r"train.txt:2: <s> is reserved"):
        CarrierPhrases.from_files(path)
    path.write_text("meet me in {}\n")
    with pytest.raises(InputError, match=r"train.txt:1: empty slot"):
        CarrierPhrases.from_files(path)


def test_long_lines_can_match_with_one_carrier_word_misheard() -> None:
    lines = ["who has the key for {place}", "meet me in {place}", "who has the key for the {machine}"]
    exact, loose = phrases(lines), phrases(lines, loose_from=3)
    heard = "he has the key for bait to".split()
    assert exact.unfilled(heard) is None
    found = loose.unfilled(heard)
    assert found is not None and (found.type, found.words) == ("place", "bait to")
    assert found.template == "who has the key for {place}"  # written as in the text, not with the wildcard
    # Only one word may differ, and short lines (three carrier words: "meet me in") stay exact...
    assert loose.unfilled("he had the key for bait to".split()) is None
    assert phrases(lines, loose_from=4).unfilled("meat me in they won".split()) is None
    # ... and an exact match is preferred to a loose one (here the loose one would sort first).
    both = phrases(["who has a key for {place}", "who has the key for {machine}"], loose_from=3)
    found = both.unfilled("who has the key for the kiln".split())
    assert found is not None and (found.type, found.words) == ("machine", "the kiln")

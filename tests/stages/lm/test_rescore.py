"""Stage lm_rescore on hand-built N-best lists, with kenlm as the reference for LM scores."""

from __future__ import annotations

import math
import warnings
from pathlib import Path
from typing import Any

import kenlm
import pydantic
import pytest

from relay.core.chain import Chain
from relay.core.errors import StageError
from relay.core.registry import Registry
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from stages.lm.kneser_ney import DiscountFallbackWarning, estimate
from stages.lm.model import score_tokens
from stages.lm.rescore import LmRescoreSettings, LmRescoreStage, lm_per_word
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from stages.normalize.tokens import readings
from tests.paths import DATA

LN10 = math.log(10)


def _context(base: Path = DATA) -> StageContext:
    return StageContext(base_dir=base, cache_dir=base / ".cache")


def _utterance(*entries: dict[str, Any]) -> Utterance:
    nbest = [Hypothesis(text=e["text"], rank=i, fields=e) for i, e in enumerate(entries)]
    return Utterance(id="u-1", source="test", speaker=None, payload={"nbest": list(entries)}, nbest=nbest)


def _chain(model: str = "lm_domain.o3.arpa", **weights: float) -> Chain:
    context = _context()
    rescore = LmRescoreStage(LmRescoreSettings(model=model, **weights), context=context)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context), rescore])
    chain.load()
    return chain


@pytest.mark.parametrize(
    ("in_domain", "confusion"),
    [
        ("book the lathe for tuesday", "book the late for tuesday"),
        ("is the band saw free now", "is the bands are free now"),
        ("report a fault on the kiln", "report a fault on the killer"),
        ("order more plywood for the store", "order more ply would for the store"),
    ],
)
def test_prefers_the_in_domain_hypothesis(in_domain: str, confusion: str) -> None:
    # The recogniser ranks the confusion first with a small margin, as it does for domain terms.
    utt = _utterance({"text": confusion, "conf": 0.5}, {"text": in_domain, "conf": 0.4})
    utt = _chain().process(utt)
    assert utt.best.text == in_domain
    assert sum(h.posterior for h in utt.nbest) == pytest.approx(1.0)


def test_a_strong_recogniser_margin_still_wins() -> None:
    # The LM re-ranks, it does not overrule: a clearly better acoustic score keeps its place.
    utt = _utterance({"text": "book the late for tuesday", "conf": 0.99999}, {"text": "book the lathe for tuesday",
                                                                            "conf": 1e-6})
    assert _chain().process(utt).best.text == "book the late for tuesday"


def test_scores_follow_the_formula_with_kenlm_as_reference() -> None:
    a, b, c, penalty = 0.8, 0.6, 0.3, 2.0
    utt = _utterance({"text": "book the lathe for zorblax", "conf": 0.3}, {"text": "open the wet room", "conf": 0.6})
    utt = _chain(asr_weight=a, lm_weight=b, word_weight=c, oov_penalty=penalty).process(utt)
    config = kenlm.Config()
    config.show_progress = False
    reference = kenlm.Model(str(DATA / "lm_domain.o3.arpa"), config)
    for h in utt.nbest:
        lm = reference.score(" ".join(h.tokens), bos=True, eos=True) * LN10
        oov = sum(1 for w in h.tokens if w not in reference)
        assert h.scores["lm"] == pytest.approx(lm, abs=1e-5)  # kenlm sums in float32
        assert h.scores["lm_per_word"] == pytest.approx(lm / (len(h.tokens) + 1))
        expected = a * h.scores["asr"] + b * lm + c * len(h.tokens) - penalty * oov
        assert h.scores["lm_rescore"] == pytest.approx(expected, abs=1e-5)
    assert [w for w in utt.nbest[0].tokens if w not in reference] == ["zorblax"]
    # softmax of the combined scores (definition)
    top = max(h.scores["lm_rescore"] for h in utt.nbest)
    z = sum(math.exp(h.scores["lm_rescore"] - top) for h in utt.nbest)
    for h in utt.nbest:
        assert h.posterior == pytest.approx(math.exp(h.scores["lm_rescore"] - top) / z)


def test_lm_score_matches_the_estimator(tmp_path: Path) -> None:
    lines = [line.split() for line in (DATA / "lm_domain.txt").read_text().splitlines() if line.strip()]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # small text: fallback is expected
        model = estimate(lines, 3)
    config = kenlm.Config()
    config.show_progress = False
    lm = kenlm.Model(str(DATA / "lm_domain.o3.arpa"), config)
    for tokens in (["book", "the", "kiln"], ["stop", "the", "lathe", "now"], []):
        assert score_tokens(lm, tokens).total == pytest.approx(model.sentence_log10(tokens) * LN10, abs=1e-3)


def test_binary_model_gives_the_same_scores() -> None:
    utt_arpa = _chain("lm_domain.o3.arpa").process(_utterance({"text": "open the loading dock"}, {"text": "x"}))
    utt_bin = _chain("lm_domain.o3.binary").process(_utterance({"text": "open the loading dock"}, {"text": "x"}))
    for h1, h2 in zip(utt_arpa.nbest, utt_bin.nbest):
        assert h1.scores["lm"] == pytest.approx(h2.scores["lm"], abs=1e-4)


def test_empty_and_unknown_hypotheses_do_not_crash() -> None:
    utt = _utterance({"text": "open the wet room"}, {"text": ""}, {"text": "zxq vvlorp krrt"}, {"text": "!!!"})
    utt = _chain(oov_penalty=3.0).process(utt)
    assert all(math.isfinite(h.scores["lm_rescore"]) for h in utt.nbest)
    assert sum(h.posterior for h in utt.nbest) == pytest.approx(1.0)
    assert utt.best.text == "open the wet room"
    empty = next(h for h in utt.nbest if not h.tokens)
    assert lm_per_word(empty) == pytest.approx(empty.scores["lm"])  # only </s> scored
    trace = utt.trace[-1]
    assert trace.stage == "lm_rescore"
    assert len(trace.scores["lm"]) == len(utt.nbest)
    assert trace.scores["oov"][[h.text for h in utt.nbest].index("zxq vvlorp krrt")] == 3


def test_posterior_used_when_no_asr_score() -> None:
    stage = LmRescoreStage(LmRescoreSettings(model="lm_domain.o3.arpa", lm_weight=0.0, word_weight=0.0),
                           context=_context())
    stage.load()
    utt = _utterance({"text": "a"}, {"text": "b"})
    for h, p in zip(utt.nbest, (0.7, 0.3)):
        h.tokens, h.posterior = [h.text], p
    utt = stage.process(utt)
    assert [h.posterior for h in utt.nbest] == pytest.approx([0.7, 0.3])


def test_lm_per_word_helper() -> None:
    h = Hypothesis(text="a b", rank=0, fields={}, tokens=["a", "b"], scores={"lm": -6.0})
    assert lm_per_word(h) == pytest.approx(-2.0)
    assert lm_per_word(Hypothesis(text="", rank=0, fields={})) is None


def test_relative_model_path_resolves_against_base_dir(tmp_path: Path) -> None:
    stage = LmRescoreStage(LmRescoreSettings(model="models/lm.arpa"), context=_context(tmp_path))
    assert stage.model_path == tmp_path / "models" / "lm.arpa"
    with pytest.raises(StageError, match="not found"):
        stage.load()
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "lm.arpa").write_text("not a model\n")
    with pytest.raises(StageError, match="cannot load model"):
        stage.load()


def test_settings_forbid_unknown_keys_and_registry_finds_the_stage() -> None:
    with pytest.raises(pydantic.ValidationError, match="lm_wieght"):
        LmRescoreSettings.model_validate({"model": "x.arpa", "lm_wieght": 1})
    assert Registry(plugins=False).get("lm_rescore") is LmRescoreStage
    # needs/provides are checked in use, not restated: tests/stages/test_contracts.py


def test_the_in_domain_model_chooses_how_a_number_is_read(tmp_path: Path) -> None:
    # "10.15" is a decimal or a time; in-domain text that speaks of times decides.
    (tmp_path / "train.txt").write_text("back in at ten fifteen\nback in at eleven thirty\nout at nine forty five\n")
    from relay.workbench.build_lm import build_model

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)
        build_model(train=tmp_path / "train.txt", output=tmp_path / "lm.arpa")
    context = _context(tmp_path)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LmRescoreStage(LmRescoreSettings(model=Path("lm.arpa")), context=context)])
    chain.load()
    utterance = chain.process(_utterance({"text": "Back in at 10.15."}))
    assert utterance.nbest[0].tokens == "back in at ten fifteen".split()
    assert utterance.text == "back in at ten fifteen"
    assert utterance.trace[-1].scores["readings_changed"] == 1
    # A number that cannot be a time keeps its one reading.
    utterance = chain.process(_utterance({"text": "back in at 10.75"}))
    assert utterance.nbest[0].tokens == "back in at ten point seven five".split()


def test_readings_changed_counts_hypotheses_not_swaps(tmp_path: Path) -> None:
    # "at 7.30 or 9.45" reads four ways; in this text the second beats the first and the fourth
    # beats the second, two swaps in the loop over one hypothesis's readings, which is one
    # hypothesis whose reading changed. "back in at 10.15" changes once; "at seven or nine" never.
    (tmp_path / "train.txt").write_text("in at seven thirty or nine forty five\nout at seven thirty\n"
                                        "back at nine forty five\nback in at ten fifteen\n")
    from relay.workbench.build_lm import build_model

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)
        build_model(train=tmp_path / "train.txt", output=tmp_path / "lm.arpa")
    context = _context(tmp_path)
    rescore = LmRescoreStage(LmRescoreSettings(model=Path("lm.arpa")), context=context)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context), rescore])
    chain.load()
    # The premise: the running best changes twice for the first text.
    totals = [rescore.score(r).total for r in readings("at 7.30 or 9.45")]
    assert len(totals) == 4
    assert totals[0] < totals[1] < totals[3] and totals[2] < totals[1]
    utterance = chain.process(_utterance({"text": "at 7.30 or 9.45", "conf": 0.5},
                                         {"text": "back in at 10.15", "conf": 0.3},
                                         {"text": "at seven or nine", "conf": 0.2}))
    before = [readings(t)[0] for t in ("at 7.30 or 9.45", "back in at 10.15", "at seven or nine")]
    by_rank = sorted(utterance.nbest, key=lambda h: h.rank)
    changed = [h.tokens != tokens for h, tokens in zip(by_rank, before)]
    assert changed == [True, True, False]
    assert utterance.trace[-1].scores["readings_changed"] == sum(changed)

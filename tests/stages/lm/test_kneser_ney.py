"""The estimator against outside references: the definition of a distribution, kenlm as the ARPA
reader, discounts worked by hand (Chen and Goodman 1998, TR-10-98, eq. 26), an add-one baseline
and reference models written by KenLM's lmplz (commands in tests/data/README.md)."""

from __future__ import annotations

import math
import warnings
from collections import Counter
from fractions import Fraction
from pathlib import Path

import kenlm
import pytest

from stages.lm.arpa import read_arpa, write_arpa
from stages.lm.kneser_ney import (
    BOS,
    EOS,
    UNK,
    DiscountFallbackWarning,
    KneserNeyModel,
    count_ngrams,
    estimate,
    estimate_discounts,
)
from tests.paths import DATA


def _lines(name: str) -> list[list[str]]:
    return [line.split() for line in (DATA / name).read_text(encoding="utf-8").splitlines() if line.strip()]


def _corpus_model(order: int = 3) -> KneserNeyModel:
    return estimate(_lines("kn_corpus.txt"), order)


def _kenlm(model: KneserNeyModel, tmp_path: Path) -> kenlm.Model:
    path = tmp_path / "model.arpa"
    write_arpa(model, path)
    config = kenlm.Config()
    config.show_progress = False
    return kenlm.Model(str(path), config)


# -- definition of a distribution --------------------------------------------------------------

@pytest.mark.parametrize("order", [2, 3, 4])
def test_every_context_distribution_sums_to_one(order: int, tmp_path: Path) -> None:
    # A conditional distribution sums to 1 over its outcomes: every word, </s> and <unk>.
    # Summed from kenlm's reading of the written ARPA, so the file's backoffs are checked too.
    model = _corpus_model(order)
    lm = _kenlm(model, tmp_path)
    outcomes = [w for w in model.vocabulary if w != BOS]
    contexts = {()} | {h for level in model.contexts[1:] for h in level}
    contexts |= {("attic", "never", "seen"), ("zebra",)}  # unseen histories back off all the way
    assert len(contexts) > 40
    for history in contexts:
        state = kenlm.State()
        if history and history[0] == BOS:
            lm.BeginSentenceWrite(state)
            rest = history[1:]
        else:
            lm.NullContextWrite(state)
            rest = history
        for word in rest:
            after = kenlm.State()
            lm.BaseScore(state, word, after)
            state = after
        total = sum(10 ** lm.BaseScore(state, w, kenlm.State()) for w in outcomes)
        assert total == pytest.approx(1.0, abs=1e-5), history  # ARPA keeps 7 digits, kenlm floats
        formula = sum(model.prob(w, history) for w in outcomes)
        assert formula == pytest.approx(1.0, abs=1e-6), history


# -- kenlm as the reference reader -------------------------------------------------------------

def test_kenlm_sentence_scores_equal_the_estimator(tmp_path: Path) -> None:
    model = _corpus_model(3)
    lm = _kenlm(model, tmp_path)
    sentences = [s for s in _lines("kn_corpus.txt")[:40]] + [
        ["please", "carry", "the", "bright", "anvil", "to", "the", "attic"],
        ["the", "ladder", "is", "by", "the", "lamp", "now"],
        ["fetch"],
        ["unknown", "words", "like", "quasar", "appear", "here"],
        [],
    ]
    for tokens in sentences:
        ours = model.sentence_log10(tokens)
        theirs = lm.score(" ".join(tokens), bos=True, eos=True)
        assert theirs == pytest.approx(ours, abs=1e-4), tokens


# -- discounts worked by hand --------------------------------------------------------------------

def test_counts_and_discounts_by_hand() -> None:
    # Corpus: the cat sat / the cat ran / a dog sat / the dog sat down, order 3.
    with pytest.warns(DiscountFallbackWarning, match="order 3"):
        model = estimate(_lines("kn_tiny.txt"), 3)
    counts = model.counts
    # Highest order: raw counts; "<s> the cat" occurs twice, every other trigram once,
    # so n1 = 11, n2 = 1, n3 = 0: no estimate possible, order 3 takes the fallback.
    assert counts[2][(BOS, "the", "cat")] == 2
    assert sorted(Counter(counts[2].values()).items()) == [(1, 11), (2, 1)]
    # Bigrams: continuation counts (distinct left words, <s> counted), except <s>-initial raw.
    assert dict(counts[1]) == {
        (BOS, "the"): 3, (BOS, "a"): 1,
        ("the", "cat"): 1, ("cat", "sat"): 1, ("sat", EOS): 2, ("cat", "ran"): 1, ("ran", EOS): 1,
        ("a", "dog"): 1, ("dog", "sat"): 2, ("the", "dog"): 1, ("sat", "down"): 1, ("down", EOS): 1,
    }
    # Unigrams: distinct left words among the bigrams; <s> and <unk> count 0.
    hand_unigrams = {"the": 1, "a": 1, "cat": 1, "sat": 2, EOS: 3, "ran": 1, "dog": 2, "down": 1, BOS: 0, UNK: 0}
    assert dict(counts[0]) == {(w,): c for w, c in hand_unigrams.items()}
    # Eq. 26: Y = n1 / (n1 + 2 n2), D_j = j - (j + 1) Y n_{j+1} / n_j.
    # Order 1: n1..n4 = 5, 2, 1, 0 -> Y = 5/9, D1 = 1 - 2(5/9)(2/5) = 5/9,
    #          D2 = 2 - 3(5/9)(1/2) = 7/6, D3 = 3 - 4(5/9)(0/1) = 3.
    # Order 2: n1..n4 = 9, 2, 1, 0 -> Y = 9/13, D1 = 9/13, D2 = 2 - 3(9/13)(1/2) = 25/26, D3 = 3.
    hand = [(Fraction(5, 9), Fraction(7, 6), Fraction(3)), (Fraction(9, 13), Fraction(25, 26), Fraction(3))]
    for k, (d1, d2, d3) in enumerate(hand):
        got = model.discounts[k]
        assert not got.fallback
        assert (got.d1, got.d2, got.d3) == pytest.approx((float(d1), float(d2), float(d3)), abs=1e-12)
    assert model.discounts[2].fallback
    assert (model.discounts[2].d1, model.discounts[2].d2, model.discounts[2].d3) == (0.5, 1.0, 1.5)
    # p(sat | the cat) by hand (Chen and Goodman eq. 17, interpolated):
    # unigram: S = 12, g = (5/9*5 + 7/6*2 + 3*1)/12 = 73/108, |V| = 9 (no <s>)
    p_sat = (2 - Fraction(7, 6)) / 12 + Fraction(73, 108) / 9
    # context "cat": cat sat 1, cat ran 1 -> S = 2, g = (9/13 * 2)/2 = 9/13
    p_sat_cat = (1 - Fraction(9, 13)) / 2 + Fraction(9, 13) * p_sat
    # context "the cat": the cat sat 1, the cat ran 1, fallback D1 = 1/2 -> g = 1/2
    p_sat_the_cat = (1 - Fraction(1, 2)) / 2 + Fraction(1, 2) * p_sat_cat
    assert model.prob("sat", ["the", "cat"]) == pytest.approx(float(p_sat_the_cat), abs=1e-12)
    assert model.probs[2][("the", "cat", "sat")] == pytest.approx(float(p_sat_the_cat), abs=1e-12)
    # <unk> gets exactly the uniform share of the unigram level
    assert model.prob("never-seen") == pytest.approx(float(Fraction(73, 108) / 9), abs=1e-12)


def test_discount_fallback_conditions() -> None:
    with pytest.warns(DiscountFallbackWarning, match="order 2: count-of-counts"):
        assert estimate_discounts([4, 0, 1, 1], order=2).fallback
    with pytest.warns(DiscountFallbackWarning, match=r"order 1: D2=.* outside"):
        low = estimate_discounts([10, 1, 30, 1], order=1, fallback=(0.25, 0.5, 0.75))
    assert (low.d1, low.d2, low.d3) == (0.25, 0.5, 0.75)
    # n4 = 0 is allowed: D3 = 3 lies in [0, 3]
    assert estimate_discounts([5, 2, 1, 0], order=1).d3 == 3


def test_duplicates_count_every_time() -> None:
    once = count_ngrams([["a", "b"]], 3)
    twice = count_ngrams([["a", "b"], ["a", "b"]], 3)
    assert (once[2][(BOS, "a", "b")], twice[2][(BOS, "a", "b")]) == (1, 2)  # highest order: raw
    assert (once[1][("a", "b")], twice[1][("a", "b")]) == (1, 1)  # continuation: one left word
    assert (once[1][(BOS, "a")], twice[1][(BOS, "a")]) == (1, 2)  # <s>-initial: raw


# -- an add-one baseline -------------------------------------------------------------------------

def _add_one_log_prob(train: list[list[str]], held_out: list[list[str]], order: int) -> float:
    raw: Counter[tuple[str, ...]] = Counter()
    vocab = {UNK, EOS}
    for tokens in train:
        vocab.update(tokens)
        padded = [BOS, *tokens, EOS]
        for i in range(1, len(padded)):
            history = tuple(padded[max(0, i - order + 1):i])
            raw[history + (padded[i],)] += 1
            raw[history] += 1
    total = 0.0
    for tokens in held_out:
        padded = [BOS, *(t if t in vocab else UNK for t in tokens), EOS]
        for i in range(1, len(padded)):
            history = tuple(padded[max(0, i - order + 1):i])
            total += math.log((raw[history + (padded[i],)] + 1) / (raw[history] + len(vocab)))
    return total


def test_held_out_perplexity_beats_add_one(tmp_path: Path) -> None:
    lines = _lines("kn_corpus.txt")
    train, held_out = lines[:300], lines[300:]
    words = sum(len(t) + 1 for t in held_out)
    with warnings.catch_warnings():
        # 300 lines are few enough for order 2 to need the fallback; either way it must win
        warnings.simplefilter("ignore", DiscountFallbackWarning)
        model = estimate(train, 3)
    lm = _kenlm(model, tmp_path)
    kn_ppl = 10 ** (-sum(lm.score(" ".join(t), bos=True, eos=True) for t in held_out) / words)
    add_one_ppl = math.exp(-_add_one_log_prob(train, held_out, 3) / words)
    assert kn_ppl < add_one_ppl
    assert kn_ppl < 0.8 * add_one_ppl  # by a clear margin, not a rounding accident


# -- reference models from lmplz -----------------------------------------------------------------

def _assert_same_arpa(ours: Path, reference: Path) -> None:
    mine, theirs = read_arpa(ours), read_arpa(reference)
    assert len(mine) == len(theirs)
    for k, (a, b) in enumerate(zip(mine, theirs), start=1):
        assert set(a) == set(b), f"{k}-grams differ: {sorted(set(a) ^ set(b))[:5]}"
        for gram, (logp, backoff) in a.items():
            ref_logp, ref_backoff = b[gram]
            assert logp == pytest.approx(ref_logp, abs=1e-4), gram
            assert backoff == pytest.approx(ref_backoff, abs=1e-4), gram


@pytest.mark.parametrize("order", [3, 4])
def test_agrees_with_lmplz_without_fallback(order: int, tmp_path: Path) -> None:
    # Reference: tests/data/kn_corpus.lmplz.o{3,4}.arpa, written by lmplz (KenLM) -o {order}.
    model = _corpus_model(order)
    assert not any(d.fallback for d in model.discounts)
    write_arpa(model, tmp_path / "ours.arpa")
    _assert_same_arpa(tmp_path / "ours.arpa", DATA / f"kn_corpus.lmplz.o{order}.arpa")


@pytest.mark.parametrize(
    ("corpus", "order", "fallback_order"),
    [("kn_tiny", 3, 3), ("kn_corpus", 5, 4)],
)
def test_agrees_with_lmplz_with_fallback(corpus: str, order: int, fallback_order: int, tmp_path: Path) -> None:
    # Reference: tests/data/{corpus}.lmplz.o{order}.arpa, written by lmplz --discount_fallback.
    with pytest.warns(DiscountFallbackWarning, match=f"order {fallback_order}:"):
        model = estimate(_lines(f"{corpus}.txt"), order)
    assert [d.fallback for d in model.discounts] == [k == fallback_order for k in range(1, order + 1)]
    write_arpa(model, tmp_path / "ours.arpa")
    _assert_same_arpa(tmp_path / "ours.arpa", DATA / f"{corpus}.lmplz.o{order}.arpa")

"""The phone channel's EM: exact sums over alignments, recovery of a known channel, the hand-cost prior."""

from __future__ import annotations

import math
import random
from functools import cache

import numpy as np
import pytest

from relay.workbench.phone_channel import (
    Channel,
    PhonePair,
    _forward_backward,
    chance_scale,
    fit_channel,
    fit_scale,
    hand_channel,
    to_costs,
)
from stages.lexicon.sound.phonetics import PHONES, CostModel, batch_similarity, encode

HAND = CostModel.features()
GONE = len(PHONES)
NUMBER = {phone: i for i, phone in enumerate(PHONES)}


def brute_force_likelihood(pair: PhonePair, channel: Channel) -> float:
    """ln P(heard | said), summing every alignment by plain recursion (the definition, no lattice)."""
    sigma = channel.inserted[GONE]

    @cache
    def rest(i: int, j: int) -> float:
        total = 0.0
        if j < len(pair.heard):
            total += channel.inserted[pair.heard[j]] * rest(i, j + 1)
        if i < len(pair.said):
            total += sigma * channel.heard[pair.said[i], GONE] * rest(i + 1, j)
            if j < len(pair.heard):
                total += sigma * channel.heard[pair.said[i], pair.heard[j]] * rest(i + 1, j + 1)
        elif j == len(pair.heard):
            total += sigma
        return total

    return math.log(rest(0, 0))


def test_forward_backward_sums_every_alignment_and_keeps_every_phone() -> None:
    rng = random.Random(5)
    channel = hand_channel(HAND, 4.0)
    for _ in range(60):
        pair = PhonePair(tuple(rng.randrange(GONE) for _ in range(rng.randint(0, 6))),
                         tuple(rng.randrange(GONE) for _ in range(rng.randint(0, 6))), 1.0)
        counts = Channel(np.zeros_like(channel.heard), np.zeros_like(channel.inserted))
        assert _forward_backward(pair, channel, counts) == pytest.approx(brute_force_likelihood(pair, channel), abs=1e-9)
        # Each said phone is heard as something or lost; each heard phone stands for a said one or was inserted.
        assert counts.heard.sum() == pytest.approx(len(pair.said))
        assert counts.heard[:, :GONE].sum() + counts.inserted[:GONE].sum() == pytest.approx(len(pair.heard))


def test_long_pairs_do_not_underflow() -> None:
    # 80 phones each way: the unscaled lattice would hold values far below the smallest double.
    pair = PhonePair(tuple(NUMBER["ZH"] for _ in range(80)), tuple(NUMBER["OY"] for _ in range(80)), 1.0)
    counts = Channel(np.zeros((GONE, GONE + 1)), np.zeros(GONE + 1))
    value = _forward_backward(pair, hand_channel(HAND, 12.0), counts)
    assert math.isfinite(value) and value < -745  # ln of the smallest positive double is about -744.4
    assert counts.heard.sum() == pytest.approx(80)


def sample(rng: random.Random, said: list[int], truth: Channel) -> tuple[int, ...]:
    """What the channel makes of ``said``: the generative story EM assumes."""
    heard: list[int] = []
    outcomes = list(range(GONE + 1))
    for phone in said + [None]:
        while True:  # insertions at this slot, until the channel stops
            choice = rng.choices(outcomes, weights=truth.inserted)[0]
            if choice == GONE:
                break
            heard.append(choice)
        if phone is not None:
            choice = rng.choices(outcomes, weights=truth.heard[phone])[0]
            if choice != GONE:
                heard.append(choice)
    return tuple(heard)


def planted_channel() -> tuple[Channel, list[int]]:
    """A channel with known confusions over twelve phones: most heard right, a few confused often."""
    used = [NUMBER[p] for p in ("T", "D", "K", "M", "N", "S", "SH", "IY", "IH", "AA", "AH", "L")]
    heard = np.zeros((GONE, GONE + 1))
    for s in range(GONE):
        heard[s, s], heard[s, GONE] = 0.93, 0.03
        heard[s, NUMBER["AH"] if s != NUMBER["AH"] else NUMBER["IH"]] = 0.04
    planted = {("T", "D"): 0.20, ("M", "N"): 0.25, ("IY", "IH"): 0.30, ("S", "SH"): 0.12, ("K", "T"): 0.10}
    for (said, confused), share in planted.items():
        heard[NUMBER[said], NUMBER[said]] -= share
        heard[NUMBER[said], NUMBER[confused]] += share
    heard[NUMBER["L"], GONE] += 0.15  # L is often lost
    heard[NUMBER["L"], NUMBER["L"]] -= 0.15
    inserted = np.full(GONE + 1, 0.0)
    inserted[NUMBER["AH"]], inserted[NUMBER["T"]] = 0.05, 0.01
    inserted[GONE] = 1.0 - inserted.sum()
    return Channel(heard, inserted), used


def planted_pairs(*, seed: int, count: int, length: int) -> list[PhonePair]:
    """``count`` stretches of ``length`` phones, drawn from the twelve of the planted channel, each
    with what the channel makes of it."""
    truth, used = planted_channel()
    rng = random.Random(seed)
    return [PhonePair(tuple(said), sample(rng, said, truth), 1.0)
            for said in (rng.choices(used, k=length) for _ in range(count))]


def test_em_recovers_a_known_channel() -> None:
    truth, used = planted_channel()
    rng = random.Random(11)
    pairs = []
    for _ in range(1500):
        said = rng.choices(used, k=rng.randint(2, 6))
        pairs.append(PhonePair(tuple(said), sample(rng, said, truth), 1.0))
    fit = fit_channel(pairs, prior=HAND, prior_weight=1.0, iterations=20, scale=8.0)
    estimate = fit.channel
    for said, heard in (("T", "D"), ("M", "N"), ("IY", "IH"), ("S", "SH"), ("K", "T"), ("T", "T"), ("IY", "IY")):
        s, h = NUMBER[said], NUMBER[heard]
        assert estimate.heard[s, h] == pytest.approx(truth.heard[s, h], abs=0.035), (said, heard)
    assert estimate.heard[NUMBER["L"], GONE] == pytest.approx(0.18, abs=0.035)
    assert estimate.inserted[NUMBER["AH"]] == pytest.approx(0.05, abs=0.01)
    # EM on the posterior never lowers the data's likelihood by more than the prior's pull allows
    # (here it is weak): the log-likelihood rises from the hand costs' start.
    assert fit.log_likelihood[-1] > fit.log_likelihood[0]
    # And the costs order the confusions as the channel does: T heard as D is cheaper than as K.
    costs = to_costs(estimate, fit.scale)
    assert costs.cost("D", "T") < costs.cost("K", "T") and costs.cost("IH", "IY") < costs.cost("AA", "IY")


def test_the_scale_of_a_channel_made_from_the_hand_costs_is_found_again() -> None:
    rng = random.Random(4)
    truth = hand_channel(HAND, 7.0)
    pairs = [PhonePair(tuple(said), sample(rng, said, truth), 1.0)
             for said in (rng.choices(range(GONE), k=5) for _ in range(400))]
    assert fit_scale(pairs, HAND) == pytest.approx(7.0, rel=0.1)


def test_without_data_the_costs_are_the_hand_costs() -> None:
    # The prior is the hand costs read as a channel, so with nothing observed the costs come back unchanged.
    fit = fit_channel([], prior=HAND, prior_weight=20.0, iterations=2, scale=9.0)
    costs = to_costs(fit.channel, fit.scale)
    assert np.allclose(costs.substitution, HAND.substitution, atol=1e-4)
    assert np.allclose(costs.deletion, HAND.deletion, atol=1e-4)
    assert np.allclose(costs.insertion, HAND.insertion, atol=1e-4)


def test_a_phone_the_corpus_never_shows_keeps_its_hand_costs() -> None:
    pairs = planted_pairs(seed=3, count=300, length=4)
    fit = fit_channel(pairs, prior=HAND, prior_weight=20.0, iterations=6)
    costs = to_costs(fit.channel, fit.scale)
    zh, oy = NUMBER["ZH"], NUMBER["OY"]
    # ZH is never said: its row (said ZH heard as ...) is the prior's. Columns move slightly, since
    # only the row is normalised: it is the row's relative costs that are the hand ones.
    assert [costs.substitution[h][zh] for h in range(GONE)] == pytest.approx(
        [HAND.substitution[h][zh] for h in range(GONE)], abs=1e-4)
    assert costs.deletion[zh] == pytest.approx(HAND.deletion[zh], abs=1e-4)
    assert costs.deletion[oy] == pytest.approx(HAND.deletion[oy], abs=1e-4)


def test_chance_scale_keeps_unrelated_stretches_as_alike_as_the_hand_costs_do() -> None:
    pairs = planted_pairs(seed=8, count=400, length=5)
    fit = fit_channel(pairs, prior=HAND, prior_weight=5.0, iterations=5)
    scale = chance_scale(fit.channel, pairs, HAND, samples=800, seed=2)
    again = random.Random(2)  # the same unrelated samples chance_scale draws
    usable = [p for p in pairs if len(p.said) >= 3 and len(p.heard) >= 3]
    heard, said = [], []
    for _ in range(800):
        i, j = again.sample(range(len(usable)), 2)
        heard.append(encode([PHONES[h] for h in usable[i].heard]))
        said.append(encode([PHONES[s] for s in usable[j].said]))
    learned = float(batch_similarity(heard, said, to_costs(fit.channel, scale)).mean())
    assert learned == pytest.approx(float(batch_similarity(heard, said, HAND).mean()), abs=0.005)

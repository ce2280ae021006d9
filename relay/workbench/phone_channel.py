"""A recogniser's phone channel, P(heard | said), learned by EM from pairs of phone strings,
smoothed toward the hand costs and turned into the lexicon aligner's costs.

The channel: each said phone s is heard as a phone h with P(h|s), or not at all with P(-|s);
at each slot (before each said phone, and after the last) heard phones that nobody said come
in, h with ι(h) each, until none more with σ = 1 - Σι. Expected counts come from
forward-backward over every alignment of a pair rather than from its single best (Viterbi)
alignment: with Viterbi counts the starting costs pick the alignments and the alignments then
confirm the costs, while summing over alignments lets an ambiguous stretch (a deletion beside
a substitution) share its count between the readings. The pairs are short (word-aligned
stretches), so the full sum costs little.

Costs are log-likelihood ratios against hearing right, in units of a scale λ (nats per unit of
cost) and clipped to the aligner's [0, 1]: sub(h|s) = (ln P(s|s) - ln P(h|s)) / λ,
del(s) = (ln P(s|s) - ln P(-|s)) / λ, ins(h) = (ln σ - ln ι(h)) / λ. λ is fitted first: the
hand costs read as a channel, P(o|s) ∝ exp(-λ hand(o, s)), at the λ under which they explain
the pairs best. That channel, as ``prior_weight`` pseudo-counts per row, is the prior of EM,
so a phone the corpus never shows keeps its hand costs exactly (at that λ) and a rare one moves
part way. ``chance_scale`` offers a second unit, one that keeps unrelated phone strings as far
apart as the hand costs keep them.
"""

from __future__ import annotations

import math
import random
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from stages.lexicon.sound.phonetics import PHONES, CostModel, batch_similarity, encode

__all__ = ["Channel", "Fit", "PhonePair", "chance_scale", "fit_channel", "fit_scale", "hand_channel", "to_costs"]

_P = len(PHONES)
_GONE = _P  # column of P(not heard | said) in Channel.heard; of σ (no more insertions) in Channel.inserted
_LEAST_SCALE, _MOST_SCALE = 0.25, 60.0  # nats per unit cost searched for λ


@dataclass(frozen=True, slots=True)
class PhonePair:
    """A stretch of said phones and what was heard for it (phone numbers, see ``phonetics.PHONES``)."""

    said: tuple[int, ...]
    heard: tuple[int, ...]
    weight: float = 1.0


@dataclass(slots=True)
class Channel:
    """``heard[s, h]`` = P(h heard | s said), ``heard[s, _GONE]`` = P(s not heard); ``inserted[h]`` = ι(h),
    ``inserted[_GONE]`` = σ. Rows sum to 1."""

    heard: npt.NDArray[np.float64]  # (phones, phones + 1)
    inserted: npt.NDArray[np.float64]  # (phones + 1,)


@dataclass(slots=True)
class Fit:
    """What ``fit_channel`` found: the channel, the expected counts of its last E-step, the scale."""

    channel: Channel
    counts: Channel  # expected counts, same layout (the pairs' own, without pseudo-counts)
    scale: float  # λ, nats per unit of cost
    log_likelihood: list[float] = field(default_factory=list)  # of the pairs, per EM iteration


def hand_channel(costs: CostModel, scale: float) -> Channel:
    """The hand costs read as a channel at ``scale``: P(o|s) ∝ exp(-scale * cost(o, s)), hearing right costing 0."""
    sub = np.asarray(costs.substitution, dtype=np.float64)  # [heard][said]
    heard = np.empty((_P, _P + 1))
    heard[:, :_P] = np.exp(-scale * sub.T)
    heard[:, _GONE] = np.exp(-scale * np.asarray(costs.deletion))
    inserted = np.empty(_P + 1)
    inserted[:_P] = np.exp(-scale * np.asarray(costs.insertion))
    inserted[_GONE] = 1.0  # no insertion, the way hearing right costs nothing
    return Channel(heard / heard.sum(axis=1, keepdims=True), inserted / inserted.sum())


def to_costs(channel: Channel, scale: float, *, decimals: int = 4) -> CostModel:
    """The aligner's costs for ``channel``: log-likelihood ratios against hearing right, over ``scale``."""
    with np.errstate(divide="ignore"):
        log_heard = np.log(channel.heard)
        log_inserted = np.log(channel.inserted)
    right = np.diag(log_heard[:, :_P])[:, None]
    sub = np.clip((right - log_heard[:, :_P]) / scale, 0.0, 1.0)  # [said][heard]
    np.fill_diagonal(sub, 0.0)
    deleted = np.clip((right[:, 0] - log_heard[:, _GONE]) / scale, 0.0, 1.0)
    inserted = np.clip((log_inserted[_GONE] - log_inserted[:_P]) / scale, 0.0, 1.0)

    def rounded(values: npt.NDArray[np.float64]) -> tuple[float, ...]:
        return tuple(round(float(v), decimals) for v in values)

    return CostModel(tuple(rounded(sub[:, h]) for h in range(_P)), rounded(inserted), rounded(deleted))


def fit_channel(pairs: Sequence[PhonePair], *, prior: CostModel, prior_weight: float, iterations: int = 10,
                scale: float | None = None) -> Fit:
    """EM from ``prior`` (read as a channel at the fitted or given ``scale``) over ``pairs``."""
    if scale is None:
        scale = fit_scale(pairs, prior)
    start = hand_channel(prior, scale)
    channel = Channel(start.heard.copy(), start.inserted.copy())
    fit = Fit(channel, Channel(np.zeros_like(start.heard), np.zeros_like(start.inserted)), scale)
    for _ in range(iterations):
        counts = Channel(np.zeros_like(start.heard), np.zeros_like(start.inserted))
        fit.log_likelihood.append(sum(_forward_backward(pair, channel, counts) for pair in pairs))
        heard = counts.heard + prior_weight * start.heard
        inserted = counts.inserted + prior_weight * start.inserted
        channel = Channel(heard / heard.sum(axis=1, keepdims=True), inserted / inserted.sum())
        fit.channel, fit.counts = channel, counts
    return fit


def chance_scale(channel: Channel, pairs: Sequence[PhonePair], reference: CostModel, *, samples: int = 3000,
                 shortest: int = 3, seed: int = 0) -> float:
    """The scale at which ``channel``'s costs align unrelated stretches (the heard side of one pair
    with the said side of another) to the same mean similarity as ``reference`` does.

    The stage's floors (``match.min_phone`` and the rest) were set against chance matches under
    the hand costs; costs rescaled this way keep what a floor lets through by chance, and change
    only which pairs look alike. Phone strings are sampled with a fixed seed.
    """
    usable = [p for p in pairs if len(p.said) >= shortest and len(p.heard) >= shortest]
    if len(usable) < 2:
        raise ValueError("too few stretches of at least three phones to compare unrelated ones")
    rng = random.Random(seed)
    heard, said = [], []
    for _ in range(samples):
        i, j = rng.sample(range(len(usable)), 2)
        heard.append(encode([PHONES[h] for h in usable[i].heard]))
        said.append(encode([PHONES[s] for s in usable[j].said]))
    target = float(batch_similarity(heard, said, reference).mean())
    low, high = math.log(_LEAST_SCALE), math.log(_MOST_SCALE) + math.log(8.0)
    for _ in range(30):  # a larger scale gives lower costs, so higher similarity: bisect on ln scale
        middle = (low + high) / 2.0
        if float(batch_similarity(heard, said, to_costs(channel, math.exp(middle))).mean()) > target:
            high = middle
        else:
            low = middle
    return math.exp((low + high) / 2.0)


def fit_scale(pairs: Sequence[PhonePair], costs: CostModel) -> float:
    """The λ under which ``hand_channel(costs, λ)`` gives the pairs the highest likelihood (golden section on ln λ)."""
    def score(log_scale: float) -> float:
        channel = hand_channel(costs, math.exp(log_scale))
        return sum(_forward_backward(pair, channel, None) for pair in pairs)

    low, high = math.log(_LEAST_SCALE), math.log(_MOST_SCALE)
    ratio = (math.sqrt(5.0) - 1.0) / 2.0
    a, b = high - ratio * (high - low), low + ratio * (high - low)
    score_a, score_b = score(a), score(b)
    for _ in range(24):  # the bracket shrinks to 0.618^24 of ln(240): under 0.01% in λ
        if score_a >= score_b:
            high, b, score_b = b, a, score_a
            a = high - ratio * (high - low)
            score_a = score(a)
        else:
            low, a, score_a = a, b, score_b
            b = low + ratio * (high - low)
            score_b = score(b)
    return math.exp((low + high) / 2.0)


def _forward_backward(pair: PhonePair, channel: Channel, counts: Channel | None) -> float:
    """The pair's weighted log-likelihood; with ``counts``, its expected counts are added there.

    Lattice node (i, j): i said phones and j heard phones used, the slot after the i-th said
    phone still open. Moves: insert heard[j] (same i), or close the slot (σ) and then hear
    said[i] as heard[j] or lose it. Rows are rescaled as they are filled (scale[i]), and the
    backward pass divides by the same factors, so long pairs do not underflow.
    """
    said, heard, weight = pair.said, pair.heard, pair.weight
    n, m = len(said), len(heard)
    table = channel.heard
    iota = channel.inserted.tolist()
    sigma = iota[_GONE]
    ins = [iota[h] for h in heard]
    alpha: list[list[float]] = []
    scale: list[float] = []
    row = [1.0] + [0.0] * m
    for j in range(m):
        row[j + 1] = row[j] * ins[j]
    for i in range(n + 1):
        if i:
            probabilities = table[said[i - 1]].tolist()
            gone = sigma * probabilities[_GONE]
            hear = [sigma * probabilities[h] for h in heard]
            previous = alpha[-1]
            row = [previous[0] * gone] + [0.0] * m
            for j in range(m):
                row[j + 1] = previous[j + 1] * gone + previous[j] * hear[j] + row[j] * ins[j]
        total = sum(row)
        if total <= 0.0:
            return -math.inf  # the channel cannot produce this pair (a probability of exactly 0)
        alpha.append([value / total for value in row])
        scale.append(total)
    end = alpha[n][m] * sigma
    log_likelihood = weight * (sum(math.log(c) for c in scale) + math.log(end))
    if counts is None:
        return log_likelihood
    # Backward: beta[i][j] in the units the scaling leaves, so that alpha * move * beta / end is
    # the move's posterior (a move into the next row also divides by that row's scale).
    beta = [[0.0] * (m + 1) for _ in range(n + 1)]
    beta[n][m] = sigma
    for j in range(m - 1, -1, -1):
        beta[n][j] = ins[j] * beta[n][j + 1]
    sub, gone_counts, ins_counts = counts.heard, counts.heard[:, _GONE], counts.inserted
    share = weight / end
    for i in range(n - 1, -1, -1):
        s = said[i]
        probabilities = table[s].tolist()
        gone = sigma * probabilities[_GONE]
        hear = [sigma * probabilities[h] for h in heard]
        after, here, before = beta[i + 1], beta[i], alpha[i]
        factor = 1.0 / scale[i + 1]
        here[m] = gone * after[m] * factor
        for j in range(m - 1, -1, -1):
            here[j] = ins[j] * here[j + 1] + (gone * after[j] + hear[j] * after[j + 1]) * factor
        lost = 0.0
        for j in range(m + 1):
            lost += before[j] * gone * after[j]
        gone_counts[s] += lost * factor * share
        for j in range(m):
            sub[s, heard[j]] += before[j] * hear[j] * after[j + 1] * factor * share
    for i in range(n + 1):
        here, before = beta[i], alpha[i]
        for j in range(m):
            ins_counts[heard[j]] += before[j] * ins[j] * here[j + 1] * share
    ins_counts[_GONE] += (n + 1) * weight  # every slot closes once
    return log_likelihood

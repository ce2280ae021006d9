"""`tune`: choose stage parameters and gate thresholds on labelled data, honestly.

The objective is the fewest wrong accepts while asking back at most a given share of
utterances, then the fewest slot errors (entities missed, wrong or put in, per entity said),
then the lowest WER. Expensive stages run once per parameter setting; the gate is
fitted on the features recorded in that run, two ways: a sweep of its hand thresholds, and a
learned confidence (logistic regression on all the features, ``stages.gate.confidence``) with
its threshold swept; the better of the two on the training utterances wins. Every reported
number comes from k-fold cross-validation: a fold's choice, the learned model included, is
fitted on the other folds and scored on it alone.
"""

from __future__ import annotations

import itertools
import random
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Generic, TypeVar

import numpy as np

from relay.workbench.evaluate import Outcome, Summary, summarize
from relay.workbench.variants import Overrides
from stages.gate.confidence import FEATURES, SIGNS, confidence, fit_model
from stages.gate.rules import FeatureView, Thresholds, decide, threshold_rules
from stages.gate.settings import GateSettings

__all__ = [
    "DEFAULT_GATE_GRID",
    "DEFAULT_SPACE",
    "Choice",
    "FoldResult",
    "RecordedFeatures",
    "cross_validate",
    "expand_space",
    "confidence_accepts",
    "fit",
    "gate_accepts",
    "make_folds",
    "rates",
]

# Candidate parameters of stages owned elsewhere, addressed by stage and parameter name (a
# grouped one by dotted name). A parameter the installed stage does not have is left out (and
# reported), so the search degrades instead of failing when a stage is absent or renamed its settings.
DEFAULT_SPACE: dict[str, dict[str, list[Any]]] = {
    # Recogniser log scores are often on a scale far from natural-log probabilities (pocketsphinx's
    # differ by thousands); the scale decides how sharp the posterior the gate reads is.
    "normalize": {"logprob_scale": [1.0, 0.3, 0.1, 0.03]},
    "lm_rescore": {"lm_weight": [0.3, 0.6, 1.0]},
    # The lexicon settings that moved entity accuracy on the example scenarios (stages/lexicon/README.md):
    # the correction floor, the weight of the heard-as-said reading (without and with the
    # recogniser's word probabilities: only one of the two applies to a word), the LM context's
    # loss side and the short-form guard. With the two above, 2,916 combinations, sampled to
    # --max-settings (24 run in about 30 s on 400 utterances).
    "lexicon": {
        "general.min_score": [0.55, 0.6, 0.7],
        "general.heard_weight": [0.2, 0.3, 0.4],
        "general.heard_weight_probs": [0.3, 0.4, 0.5],
        "context.loss_weight": [0.03, 0.06, 0.1],
        "general.short_penalty": [0.1, 0.2, 0.3],
    },
}
DEFAULT_GATE_GRID: dict[str, list[float]] = {
    "accept_posterior": [0.0, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9],
    "accept_margin": [0.0, 0.05, 0.1, 0.2, 0.3, 0.5],
    "accept_entity": [0.0, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9],
    "accept_correction": [0.0, 0.5, 0.7, 0.85, 1.01],
    "accept_without_entity": [1.0, 0.0],
}
_GATE_KEYS = tuple(DEFAULT_GATE_GRID)
_TIE = 0.005  # wrong-accept rates this close count as equal; slot errors, then WER, decide

# The confidence features a model fitted on one domain's corpus is given: there
# line_edit_relative is line_edit_share less a constant (the domain's own lines' share), and
# missing_slot_odds is missing_slots times one, so after centering and scaling they are the very
# same columns; text_oov_relative is text_oov less a constant times words, two columns it has.
_ONE_DOMAIN = tuple(name for name in FEATURES
                    if name not in ("line_edit_relative", "missing_slot_odds", "text_oov_relative"))


def expand_space(space: dict[str, dict[str, list[Any]]], *, max_settings: int, seed: int) -> list[Overrides]:
    """Every combination of the space's values; a seeded sample of ``max_settings`` if more."""
    axes = [(stage, param, values) for stage, params in space.items() for param, values in params.items()]
    combos = list(itertools.product(*[values for _, _, values in axes])) or [()]
    if len(combos) > max_settings:
        combos = random.Random(seed).sample(combos, max_settings)
    settings = []
    for combo in combos:
        overrides: Overrides = {}
        for (stage, param, _), value in zip(axes, combo):
            overrides.setdefault(stage, {})[param] = value
        settings.append(overrides)
    return settings


def make_folds(n: int, k: int, seed: int) -> list[np.ndarray]:
    """k disjoint index sets covering range(n), shuffled with a fixed seed."""
    if not 2 <= k <= n:
        raise ValueError(f"cross-validation needs 2 <= folds <= utterances, got {k} folds for {n}")
    order = np.random.default_rng(seed).permutation(n)
    return [np.sort(part) for part in np.array_split(order, k)]


@dataclass(frozen=True, slots=True)
class Choice:
    """A fitted setting: which stage parameters (by index into the tried settings) and gate thresholds."""

    setting: int
    gate: dict[str, Any]


class RecordedFeatures:
    """One setting's recorded gate features as arrays, for vectorised threshold sweeps."""

    def __init__(self, outcomes: Sequence[Outcome]) -> None:
        if any(o.gate is None for o in outcomes):
            raise ValueError("tuning needs gate features: the chain must end with a gate stage")
        gates = [o.gate for o in outcomes if o.gate is not None]
        self.posterior = np.array([g.posterior for g in gates])
        self.margin = np.array([g.margin for g in gates])
        self.weakest = np.array([np.inf if g.weakest_entity is None else g.weakest_entity for g in gates])
        self.has_entity = np.array([g.weakest_entity is not None for g in gates])
        self.correction = np.array([np.inf if not g.corrected else (g.correction_score or 0.0) for g in gates])
        self.lm = np.array([np.inf if g.lm_per_word is None else g.lm_per_word for g in gates])
        self.blocked = np.array([g.empty or g.safety_rule is not None for g in gates])
        self.safety = np.array([g.safety_rule is not None for g in gates])  # asked back by policy
        self.values = [g.values() for g in gates]
        self.ok = np.array([o.entity_ok for o in outcomes])
        self.errors = np.array([o.errors_relay for o in outcomes])
        self.words = np.array([o.ref_words for o in outcomes])
        self.slot_errors = np.array([o.slot_errors for o in outcomes])
        self.slots = np.array([len(o.reference_ids) for o in outcomes])


def gate_accepts(features: RecordedFeatures, grid: np.ndarray, min_lm: float | None) -> np.ndarray:
    """Boolean (thresholds x utterances): where ``decide`` would accept. Rows follow _GATE_KEYS.

    The same conditions as the live gate (``stages.gate.rules.threshold_rules``), evaluated with
    the utterances along one axis and the candidate thresholds (grid rows) along the other.
    """
    p, m, e, c, w = (grid[:, i:i + 1] for i in range(5))
    view = FeatureView(empty=features.blocked, posterior=features.posterior, margin=features.margin,
                       weakest=features.weakest, has_entity=features.has_entity, correction=features.correction,
                       lm=features.lm)
    shape = (grid.shape[0], features.posterior.shape[0])
    asks = np.zeros(shape, dtype=bool)
    for _decision, _rule, holds in threshold_rules(view, Thresholds(p, m, e, c, w, min_lm_per_word=min_lm)):
        asks |= np.broadcast_to(holds, shape)
    return ~asks


def _lm_grid(features: RecordedFeatures, index: np.ndarray) -> list[float | None]:
    known = features.lm[index][np.isfinite(features.lm[index])]
    if known.size == 0:
        return [None]
    return [None] + sorted({round(float(q), 3) for q in np.percentile(known, [5, 10, 20, 30])})


# Hand thresholds that let everything through, as a row of the grid (the learned confidence decides).
_OPEN_ROW = np.array([{"accept_posterior": 0.0, "accept_margin": 0.0, "accept_entity": 0.0, "accept_correction": 0.0,
                       "accept_without_entity": 1.0}[k] for k in _GATE_KEYS])
_CONFIDENCE_STEPS = np.linspace(0.0, 100.0, 81)  # candidate thresholds: percentiles of training confidence


def confidence_accepts(features: RecordedFeatures, sure: np.ndarray, thresholds: np.ndarray,
                       index: np.ndarray | None = None) -> np.ndarray:
    """Boolean (thresholds x utterances): where ``decide`` would accept with the hand thresholds
    open and the learned confidence ``sure`` of each utterance (of ``index``, if given) held to
    each threshold."""
    accept = gate_accepts(features, _OPEN_ROW[None, :], None)
    return (accept if index is None else accept[:, index]) & (sure >= thresholds[:, None])


def rates(accept: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row of a (candidates x utterances) accept matrix: accepted count, share asked back,
    wrong-accept rate (0 where nothing is accepted)."""
    accepted = accept.sum(axis=1)
    clarify = 1 - accepted / accept.shape[1]
    wrong = (accept & ~ok).sum(axis=1) / np.maximum(accepted, 1)
    return accepted, clarify, wrong


def _thresholds(row: np.ndarray) -> dict[str, Any]:
    """A row of the threshold grid as gate settings (in _GATE_KEYS order)."""
    gate: dict[str, Any] = {k: float(row[i]) for i, k in enumerate(_GATE_KEYS)}
    gate["accept_without_entity"] = bool(gate["accept_without_entity"])
    return gate


def _best_row(accept: np.ndarray, ok: np.ndarray, max_clarify: float) -> tuple[int, tuple[float, float, float]]:
    """The best row of a (candidates x utterances) accept matrix: (row, (over budget, wrong, clarify))."""
    _, clarify, wrong = rates(accept, ok)
    # Over budget is allowed only when nothing fits; then ask back as little as possible.
    over = np.maximum(clarify - max_clarify, 0)
    row = int(np.lexsort((clarify, np.round(wrong / _TIE), over))[0])
    return row, (float(over[row]), float(np.round(wrong[row] / _TIE)), float(clarify[row]))


def fit(recorded: Sequence[RecordedFeatures], index: np.ndarray, *, max_clarify: float,
        gate_grid: dict[str, list[float]] = DEFAULT_GATE_GRID, learn: bool = True) -> Choice:
    """The best setting and gate on the utterances in ``index`` only.

    With ``learn``, a confidence model is fitted on those utterances too and competes with the
    hand thresholds.
    """
    grid = np.array(list(itertools.product(*[gate_grid[k] for k in _GATE_KEYS])), dtype=float)
    best: tuple[tuple[float, ...], Choice] | None = None

    def consider(key: tuple[float, ...], setting: int, gate: dict[str, Any]) -> None:
        nonlocal best
        if best is None or key < best[0]:
            best = (key, Choice(setting=setting, gate=gate))

    for setting, features in enumerate(recorded):
        errors = float(features.errors[index].sum() / max(1, features.words[index].sum()))
        slot_errors = float(features.slot_errors[index].sum() / max(1, features.slots[index].sum()))
        ok = features.ok[index]
        # The budget bounds what the gate asks back from doubt; the safety rule's asks are policy,
        # the same for every candidate, and come on top.
        budget = max_clarify + float(features.safety[index].mean())
        for min_lm in _lm_grid(features, index):
            row, (over, wrong, clarify) = _best_row(gate_accepts(features, grid, min_lm)[:, index], ok, budget)
            gate = _thresholds(grid[row]) | {"min_lm_per_word": min_lm, "confidence": None}
            consider((over, wrong, slot_errors, errors, clarify), setting, gate)
        if not learn:
            continue
        model = fit_model([features.values[i] for i in index], ok.tolist(), signs=SIGNS, features=_ONE_DOMAIN)
        sure = np.array([confidence(features.values[i], model) for i in index])
        thresholds = np.unique(np.r_[np.percentile(sure, _CONFIDENCE_STEPS), 0.0])
        accept = confidence_accepts(features, sure, thresholds, index)
        row, (over, wrong, clarify) = _best_row(accept, ok, budget)
        gate = _thresholds(_OPEN_ROW) | {
            "min_lm_per_word": None, "confidence": model.model_dump(), "accept_confidence": float(thresholds[row])}
        consider((over, wrong, slot_errors, errors, clarify), setting, gate)
    if best is None:
        raise ValueError("nothing to choose from: no parameter setting was tried")
    return best[1]


def gate_settings(base: GateSettings, gate: dict[str, Any]) -> GateSettings:
    """``base`` with tuned accept thresholds; reprompt thresholds lowered to stay below them."""
    update = dict(gate)
    update["reprompt_posterior"] = min(base.reprompt_posterior, gate["accept_posterior"])
    update["reprompt_entity"] = min(base.reprompt_entity, gate["accept_entity"])
    if "accept_confidence" in gate:
        update["reprompt_confidence"] = min(base.reprompt_confidence, gate["accept_confidence"])
    return GateSettings.model_validate({**base.model_dump(), **update})


def decisions_for(outcomes: Sequence[Outcome], settings: GateSettings) -> list[Any]:
    return [decide(o.gate, settings)[0] if o.gate is not None else o.decision for o in outcomes]


T = TypeVar("T")


@dataclass(frozen=True, slots=True)
class FoldResult(Generic[T]):
    fold: int
    train: np.ndarray
    test: np.ndarray
    choice: Choice
    score: T


def cross_validate(folds: Sequence[np.ndarray], fit_on: Callable[[np.ndarray], Choice],
                   score_on: Callable[[Choice, np.ndarray], T]) -> list[FoldResult[T]]:
    """Fit on all folds but one, score on that one, for each fold in turn.

    ``fit_on`` only ever receives training indices and ``score_on`` only the held-out ones,
    which is what makes the reported numbers held-out numbers.
    """
    results = []
    for number, test in enumerate(folds):
        train = np.sort(np.concatenate([f for i, f in enumerate(folds) if i != number]))
        choice = fit_on(train)
        results.append(FoldResult(number, train, test, choice, score_on(choice, test)))
    return results


def held_out_summary(runs: Sequence[Sequence[Outcome]], results: Sequence[FoldResult[Any]],
                     base: GateSettings) -> Summary:
    """Pool each fold's held-out utterances, decided with the thresholds fitted without them."""
    pooled: list[Outcome] = []
    decisions: list[Any] = []
    for result in results:
        chosen = [runs[result.choice.setting][i] for i in result.test]
        pooled += chosen
        decisions += decisions_for(chosen, gate_settings(base, result.choice.gate))
    return summarize(pooled, decisions=decisions)

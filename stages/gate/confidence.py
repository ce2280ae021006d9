"""The gate's learned confidence: a logistic model over the recorded gate features.

Hand thresholds on one score at a time (posterior, margin, weakest entity) cannot see the
commonest failure on real recogniser output: an entity that was never found, so no score of
it exists. What gives that away is the finished text itself - everyday words where the
in-domain language model expects a name (a low per-word score, a very unlikely word, words it
has never seen) - together with how many entities were found and how sure the N-best is.
``ConfidenceModel`` weighs these features into the probability that the result's entities are
exactly right; `rehear tune` fits it on labelled logs (on training folds only) and picks the
threshold under the clarification budget.

The model is plain logistic regression, fitted by Newton's method (iteratively reweighted
least squares) with a small L2 penalty on standardised features. Each feature is centred and
scaled by its training mean and standard deviation, and those two numbers travel with the
weights, so the YAML stays readable ("a standard deviation more OOV words: -0.8") and a
feature missing at run time (no language model configured) counts as its training mean.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from pydantic import BaseModel, ConfigDict, Field, model_validator

__all__ = ["FEATURES", "SIGNS", "ConfidenceModel", "FeatureWeight", "confidence", "contributions", "fit_logistic",
           "fit_model", "sigmoid"]

# The features a model may use, in a fixed order. Values from the language model are natural
# logs and floored at _LM_FLOOR so one unknown word cannot dominate.
FEATURES: tuple[str, ...] = (
    "posterior",          # top posterior after the whole chain
    "margin",             # lead over the runner-up
    "weakest_entity",     # lowest entity score; 1 when no entity was found
    "entities",           # how many entities were found
    "corrections",        # how many corrections the chain made
    "words",              # words in the result
    "lm_per_word",        # in-domain LM per word of the top hypothesis before lexicon correction
    "text_lm_per_word",   # in-domain LM per word of the finished text
    "text_lm_weakest",    # the finished text's least likely word under the LM
    "text_oov",           # words of the finished text the LM has never seen
    "unfilled_slots",     # 1 when an in-domain carrier phrase has a slot that no entity fills
    "line_edits",         # word edits from the finished text (entities marked) to the nearest in-domain line
    "asr_log_conf",       # natural log of the recogniser's own confidence (`conf`), when it gives one
    "weakest_support",    # least posterior share of hypotheses holding an entity by a strong sound match
    "weakest_heard",      # least posterior share of hypotheses holding an entity word for word
    "weakest_lead",       # least lead of an entity over the runner-up entry for its words
    "invented",           # corrections into an entity no hypothesis holds word for word
    "rewritten",          # share of the result's words put there by corrections
    "text_lm_relative",   # text_lm_per_word relative to the in-domain lines' own (standard deviations)
    "line_edit_share",    # line_edits per word of the result
    "asr_word_mean",      # mean natural log of the recogniser's per-word probabilities (`word_probs`), when given
    "missing_slots",      # slots of the nearest in-domain line beyond the entities found
    "most_overridden",    # most belief that words a correction replaced were said as heard (stages/lexicon/heard.py)
    "foreign_slots",      # entities whose type the nearest in-domain line has no slot for
    "line_edit_relative",  # line_edit_share beyond the in-domain lines' own to one another
    "missing_slot_odds",  # missing_slots times the log-odds against an in-domain line without entities
    "text_oov_relative",  # text_oov less the unseen words the in-domain lines lead one to expect
    "asr_no_conf",        # 1 when the recogniser gave no `conf` for any hypothesis of the message
)
_LM_FLOOR = -30.0
# Which way each feature may move the confidence, where the direction is known before any data:
# +1 the higher the surer, -1 the higher the less sure. ``fit_model(..., signs=SIGNS)`` drops a
# feature whose fitted weight points the other way (collinear features can flip a sign, and a
# correction made on thin evidence must never raise confidence). ``entities`` counts chances to be
# wrong: with the evidence for each entity read by the weakest_* features, one more entity found
# cannot make the set likelier right. Fitted free it came out positive (results with more names
# came from well-formed requests), so an entity added on thin evidence raised the confidence
# ("the kelda hoist is down to insulin" -> "... is pontoon c", accepted at 0.85).
SIGNS: dict[str, int] = {
    "posterior": 1, "margin": 1, "weakest_entity": 1, "corrections": -1, "lm_per_word": 1,
    "text_lm_per_word": 1, "text_lm_weakest": 1, "text_oov": -1, "unfilled_slots": -1, "line_edits": -1,
    "asr_log_conf": 1, "weakest_support": 1, "weakest_heard": 1, "weakest_lead": 1, "invented": -1,
    "rewritten": -1, "text_lm_relative": 1, "line_edit_share": -1, "asr_word_mean": 1, "missing_slots": -1,
    "most_overridden": -1, "foreign_slots": -1, "entities": -1, "line_edit_relative": -1,
    "missing_slot_odds": -1, "text_oov_relative": -1, "asr_no_conf": -1,
}


def sigmoid(value: float) -> float:
    if value >= 0:
        return 1.0 / (1.0 + math.exp(-value))
    z = math.exp(value)
    return z / (1.0 + z)


class FeatureWeight(BaseModel):
    """One feature's term: weight * (value - center) / scale."""

    model_config = ConfigDict(extra="forbid")

    weight: float
    center: float = 0.0
    scale: float = Field(1.0, gt=0)


class ConfidenceModel(BaseModel):
    """Probability that the result's entities are right: sigmoid(bias + sum of feature terms)."""

    model_config = ConfigDict(extra="forbid")

    bias: float = 0.0
    features: dict[str, FeatureWeight] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _known(self) -> ConfidenceModel:
        unknown = sorted(set(self.features) - set(FEATURES))
        if unknown:
            raise ValueError(f"unknown feature(s) {', '.join(unknown)} (allowed: {', '.join(FEATURES)})")
        return self


def _floored(name: str, value: float) -> float:
    return max(value, _LM_FLOOR) if name.startswith(("lm_", "text_lm_")) else value


def confidence(values: Mapping[str, float | None], model: ConfidenceModel) -> float:
    """The model's probability for one utterance's feature values (None: unknown, counts as the mean)."""
    total = model.bias
    for name, term in model.features.items():
        value = values.get(name)
        if value is not None and math.isfinite(value):
            total += term.weight * (_floored(name, value) - term.center) / term.scale
    return sigmoid(total)


def contributions(values: Mapping[str, float | None], model: ConfidenceModel) -> dict[str, float]:
    """Each feature's term in the model's log-odds for these values (0 for an unknown value)."""
    out = {}
    for name, term in model.features.items():
        value = values.get(name)
        known = value is not None and math.isfinite(value)
        out[name] = term.weight * (_floored(name, value) - term.center) / term.scale if known else 0.0  # type: ignore[arg-type]
    return out


def fit_logistic(x: npt.NDArray[np.float64], y: npt.NDArray[np.float64], *, l2: float = 0.0,
                 iterations: int = 50, tolerance: float = 1e-10) -> tuple[float, npt.NDArray[np.float64]]:
    """(intercept, weights) maximising the log-likelihood minus ``l2``/2 * |weights|^2 (intercept free).

    Newton's method on the penalised log-likelihood; ``x`` is used as given (standardise first).
    """
    rows, columns = x.shape
    design = np.hstack([np.ones((rows, 1)), x])
    beta = np.zeros(columns + 1)
    penalty = np.full(columns + 1, l2)
    penalty[0] = 0.0
    for _ in range(iterations):
        p = 1.0 / (1.0 + np.exp(-np.clip(design @ beta, -35, 35)))
        gradient = design.T @ (y - p) - penalty * beta
        hessian = (design.T * (p * (1 - p))) @ design + np.diag(penalty) + 1e-9 * np.eye(columns + 1)
        step = np.linalg.solve(hessian, gradient)
        beta += step
        if float(np.max(np.abs(step))) < tolerance:
            break
    return float(beta[0]), beta[1:]


@dataclass(frozen=True, slots=True)
class _Column:
    name: str
    values: npt.NDArray[np.float64]


def fit_model(rows: Sequence[Mapping[str, float | None]], right: Sequence[bool], *, l2: float = 1.0,
              signs: Mapping[str, int] | None = None, features: Sequence[str] = FEATURES) -> ConfidenceModel:
    """A model fitted on feature values and whether each result's entities were right.

    Features that are missing everywhere or constant are left out; a value missing in some
    rows is filled with the mean of the others. With ``signs``, a feature whose weight comes out
    against its sign is dropped and the rest fitted again, the worst first, until none is left.
    """
    chosen = list(features)
    while True:
        model = _fit(rows, right, l2=l2, features=chosen)
        against = [n for n, t in model.features.items() if signs is not None and signs.get(n, 0) * t.weight < 0]
        if not against:
            return model
        chosen.remove(min(against, key=lambda n: signs.get(n, 0) * model.features[n].weight))  # type: ignore[union-attr]


def _fit(rows: Sequence[Mapping[str, float | None]], right: Sequence[bool], *, l2: float,
         features: Sequence[str]) -> ConfidenceModel:
    columns: list[_Column] = []
    for name in features:
        raw = np.array([np.nan if (v := row.get(name)) is None else _floored(name, float(v)) for row in rows])
        known = raw[np.isfinite(raw)]
        if known.size == 0 or float(known.std()) < 1e-9:
            continue
        columns.append(_Column(name, np.where(np.isfinite(raw), raw, known.mean())))
    y = np.asarray(right, dtype=float)
    if not columns or y.min(initial=1.0) == y.max(initial=0.0):
        # Nothing to learn from: a constant model at the observed rate of right results.
        rate = float(np.clip(y.mean() if y.size else 0.5, 1e-3, 1 - 1e-3))
        return ConfidenceModel(bias=math.log(rate / (1 - rate)))
    centers = np.array([c.values.mean() for c in columns])
    scales = np.array([c.values.std() for c in columns])
    x = (np.column_stack([c.values for c in columns]) - centers) / scales
    bias, weights = fit_logistic(x, y, l2=l2)
    return ConfidenceModel(bias=round(bias, 6), features={
        c.name: FeatureWeight(weight=round(float(w), 6), center=round(float(m), 6), scale=round(float(s), 6))
        for c, w, m, s in zip(columns, weights, centers, scales)
    })

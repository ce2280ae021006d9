"""The gate's learned confidence: logistic regression fitted by Newton's method."""

from __future__ import annotations

import math

import numpy as np
import pytest
from pydantic import ValidationError

from stages.gate.confidence import (
    ConfidenceModel,
    FeatureWeight,
    confidence,
    fit_logistic,
    fit_model,
    sigmoid,
)


def test_one_binary_feature_reproduces_the_log_odds_of_each_group() -> None:
    # Outside check: with an intercept and one 0/1 feature the model is saturated, and the
    # maximum-likelihood fit reproduces the observed proportions, so the intercept is the
    # log-odds of group 0 and the weight the log-odds ratio (textbook result for the 2x2 table,
    # e.g. Agresti, Categorical Data Analysis, ch. 5 - chapter quoted from memory). Counts by hand:
    # group 0: 3 right of 10; group 1: 8 right of 10.
    x = np.array([[0.0]] * 10 + [[1.0]] * 10)
    y = np.array([1.0] * 3 + [0.0] * 7 + [1.0] * 8 + [0.0] * 2)
    intercept, weights = fit_logistic(x, y)
    assert intercept == pytest.approx(math.log(3 / 7), abs=1e-8)
    assert weights[0] == pytest.approx(math.log(8 / 2) - math.log(3 / 7), abs=1e-8)


def test_the_fit_solves_the_score_equations_and_is_a_maximum() -> None:
    # Outside check: the logistic log-likelihood's gradient is X^T (y - p); at the maximum
    # (no penalty) it vanishes for the intercept and every feature.
    rng = np.random.default_rng(3)
    x = rng.normal(size=(300, 3))
    y = (rng.random(300) < 1 / (1 + np.exp(-(0.5 + x @ np.array([1.5, -2.0, 0.0]))))).astype(float)
    intercept, weights = fit_logistic(x, y)
    p = 1 / (1 + np.exp(-(intercept + x @ weights)))
    assert abs(float(np.sum(y - p))) < 1e-8
    assert np.allclose(x.T @ (y - p), 0.0, atol=1e-8)

    def loglik(b0: float, w: np.ndarray) -> float:
        z = b0 + x @ w
        return float(np.sum(y * z - np.log1p(np.exp(z))))

    best = loglik(intercept, weights)
    for delta in (np.array([0.05, 0, 0]), np.array([0, -0.05, 0]), np.array([0, 0, 0.05])):
        assert loglik(intercept, weights + delta) < best
    assert loglik(intercept + 0.05, weights) < best
    assert weights[0] > 0 > weights[1]


def test_a_penalty_shrinks_the_weights_but_not_the_intercept_to_zero() -> None:
    rng = np.random.default_rng(4)
    x = rng.normal(size=(200, 2))
    y = (x[:, 0] + rng.normal(scale=0.5, size=200) > 0).astype(float)
    _, free = fit_logistic(x, y)
    _, shrunk = fit_logistic(x, y, l2=50.0)
    assert np.all(np.abs(shrunk) < np.abs(free))


def test_fit_model_learns_the_direction_and_skips_useless_features() -> None:
    rng = np.random.default_rng(5)
    rows, right = [], []
    for _ in range(400):
        oov = float(rng.integers(0, 4))
        rows.append({"text_oov": oov, "posterior": 0.5, "margin": None, "entities": float(rng.integers(0, 3))})
        right.append(bool(rng.random() < (0.9 if oov == 0 else 0.2)))
    model = fit_model(rows, right)
    assert set(model.features) == {"text_oov", "entities"}  # constant and all-missing features are left out
    assert model.features["text_oov"].weight < 0
    assert confidence({"text_oov": 0.0}, model) > 0.6 > 0.3 > confidence({"text_oov": 3.0}, model)


def test_one_class_only_gives_a_constant_model_at_the_observed_rate() -> None:
    model = fit_model([{"posterior": 0.1}, {"posterior": 0.9}], [True, True])
    assert not model.features
    assert confidence({"posterior": 0.5}, model) == pytest.approx(0.999)


def test_a_missing_value_counts_as_the_training_mean_and_lm_values_are_floored() -> None:
    model = ConfidenceModel(bias=0.3, features={
        "text_lm_per_word": FeatureWeight(weight=1.0, center=-4.0, scale=2.0),
        "posterior": FeatureWeight(weight=2.0, center=0.5, scale=0.25),
    })
    assert confidence({"posterior": 0.5}, model) == pytest.approx(sigmoid(0.3))
    assert confidence({"posterior": 0.75, "text_lm_per_word": -2.0}, model) == pytest.approx(sigmoid(0.3 + 2 + 1))
    # -1000 per word (an unknown word scored as log zero) is floored at -30.
    assert confidence({"posterior": 0.5, "text_lm_per_word": -1000.0}, model) == pytest.approx(sigmoid(0.3 - 13))


def test_unknown_features_are_refused_by_name() -> None:
    with pytest.raises(ValidationError, match="unknown feature.*loudness"):
        ConfidenceModel(features={"loudness": FeatureWeight(weight=1.0)})


def test_sigmoid_is_stable_at_the_extremes() -> None:
    assert sigmoid(-800.0) == 0.0
    assert sigmoid(800.0) == 1.0
    assert sigmoid(0.0) == 0.5


def test_the_shipped_default_model_leans_the_known_way_on_every_feature() -> None:
    from stages.gate.confidence import SIGNS
    from stages.gate.settings import GateSettings, default_confidence

    model = default_confidence()
    assert GateSettings().model() == model  # used when a configuration names none
    assert GateSettings(confidence=None).model() is None
    assert len(model.features) >= 5
    for name, term in model.features.items():
        assert SIGNS.get(name, 0) * term.weight >= 0, f"{name} leans against its known direction"


def test_fit_model_drops_a_feature_that_comes_out_against_its_sign() -> None:
    # "invented" rises with rightness in this made-up data; held to its sign (-1) it is dropped,
    # not given a weight that would make an invented correction raise confidence.
    rng = np.random.default_rng(3)
    right = rng.random(300) < 0.6
    rows = [{"posterior": float(r) * 0.5 + float(rng.random()) * 0.5, "invented": float(r)} for r in right]
    free = fit_model(rows, right.tolist())
    assert free.features["invented"].weight > 0
    held = fit_model(rows, right.tolist(), signs={"invented": -1, "posterior": 1})
    assert "invented" not in held.features and held.features["posterior"].weight > 0

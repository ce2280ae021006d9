"""One decision rule: the live gate's decide() and tune's vectorised sweep agree everywhere."""

from __future__ import annotations

import itertools

import numpy as np

from relay.workbench.evaluate import Outcome
from relay.workbench.tuning import DEFAULT_GATE_GRID, RecordedFeatures, _thresholds, gate_accepts
from stages.gate.features import GateFeatures
from stages.gate.rules import decide
from stages.gate.settings import GateSettings


def _random_features(rng: np.random.Generator) -> GateFeatures:
    has_entity, corrected = rng.random() < 0.7, rng.random() < 0.3
    return GateFeatures(
        posterior=float(rng.random()), margin=float(rng.random()),
        weakest_entity=float(rng.random()) if has_entity else None, corrected=corrected,
        correction_score=float(rng.random()) if corrected else None,
        lm_per_word=float(-rng.random() * 8) if rng.random() < 0.8 else None,
        safety_rule="word:start" if rng.random() < 0.1 else None, empty=bool(rng.random() < 0.05))


def test_vectorised_sweep_accepts_exactly_where_decide_accepts() -> None:
    rng = np.random.default_rng(5)
    features = [_random_features(rng) for _ in range(300)]
    outcomes = [Outcome(id=str(i), tags={}, ref_words=1, errors_first=0, errors_oracle=0, errors_relay=0,
                        reference_ids=frozenset(), found={}, decision=None, gate=f, stage_us={}, total_us=0.0)
                for i, f in enumerate(features)]
    recorded = RecordedFeatures(outcomes)
    rows = list(itertools.product(*DEFAULT_GATE_GRID.values()))
    grid = np.array([rows[i] for i in rng.choice(len(rows), 60, replace=False)], dtype=float)
    for min_lm in (None, -4.0):
        swept = gate_accepts(recorded, grid, min_lm)
        for r, row in enumerate(grid):
            settings = GateSettings.model_validate(
                _thresholds(row) | {"min_lm_per_word": min_lm, "reprompt_posterior": 0.0, "reprompt_entity": 0.0,
                                    "confidence": None})
            one_by_one = [decide(f, settings)[0] == "accept" for f in features]
            assert swept[r].tolist() == one_by_one, f"row {row} min_lm {min_lm}"
    assert swept.any() and not swept.all()  # the grid holds accepting and asking rows

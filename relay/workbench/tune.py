"""The tune workflow: run the chain once per stage setting, fit the gate on recorded features by
k-fold cross-validation, and write back a configuration `run` and `eval` accept.

Every number it reports is held out: each fold is scored with the choice, model included,
fitted on the other folds only. The written configuration is fitted on every utterance given.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from tqdm import tqdm

from relay.core.config import LoadedConfig
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.workbench.corpus import CorpusItem
from relay.workbench.evaluate import Summary, run_corpus, summarize
from relay.workbench.tuning import (
    DEFAULT_SPACE,
    FoldResult,
    RecordedFeatures,
    cross_validate,
    decisions_for,
    expand_space,
    fit,
    gate_settings,
    held_out_summary,
    make_folds,
)
from relay.workbench.variants import Overrides, VariantBuilder, config_from_dict, with_overrides
from stages.gate.settings import GateSettings

__all__ = ["TuneResult", "deciding_spec", "tune", "usable_space", "with_gate"]

Space = dict[str, dict[str, list[Any]]]


def _note(message: str) -> None:
    print(f"rehear tune: {message}", file=sys.stderr)


def deciding_spec(loaded: LoadedConfig, registry: Registry | None = None) -> int | None:
    """Index into the ``stages:`` list of the stage that decides (provides "decision"), found by
    what the registered class declares, not by its name."""
    registry = registry or Registry()
    found = None
    for position, spec in enumerate(loaded.config.stages):
        if "decision" in registry.get(spec.name).provides:
            found = position
    return found


def with_gate(loaded: LoadedConfig) -> LoadedConfig:
    """The chain with a deciding stage at its end (the built-in gate when it has none)."""
    if deciding_spec(loaded) is not None:
        return loaded
    raw = dict(loaded.source.value)
    raw["stages"] = [*(raw.get("stages") or []), "gate"]
    return config_from_dict(raw, base_dir=loaded.base_dir, label=loaded.source.file)


def usable_space(space: Space, builder: VariantBuilder, *, gate: str, warn: Callable[[str], None] = _note) -> Space:
    """The search space restricted to stages and settings the chain has; what is dropped is reported."""
    usable: Space = {}
    for stage, params in space.items():
        if stage == gate:
            continue  # gate thresholds are swept on recorded scores, not re-run
        if stage not in builder.stage_names:
            warn(f"the chain has no stage {stage}; not tuning its parameters")
            continue
        known = builder.settings_fields(stage)
        for written, values in params.items():
            param = builder.current_name(stage, written)  # an old name means the setting's new place
            if param not in known:
                warn(f"stage {stage} has no setting {param} (has: {', '.join(sorted(known))}); skipped")
            elif not isinstance(values, list) or not values:
                raise ConfigError(f"Invalid search space: {stage}.{param} must be a non-empty list")
            else:
                usable.setdefault(stage, {})[param] = values
    return usable


@dataclass
class TuneResult:
    """What a tune run found: the held-out numbers and the configuration to write."""

    settings: list[Overrides]  # the stage settings tried
    space: Space
    folds: list[FoldResult[Summary]]  # every repeat's folds, in turn
    held_out: Summary  # every repeat's held-out folds pooled: each utterance counts once a repeat
    config: dict[str, Any]  # the written form, with the final choice (fitted on every utterance)
    stages: list[Any]  # the written stages: list with the tuned parameters (and the gate, when it was added)
    # The held-out numbers had the doubt budget been another (the first split's folds, refitted
    # on the runs already made: only the gate fits cost again).
    at_budget: Callable[[float], Summary]


def tune(loaded: LoadedConfig, items: Sequence[CorpusItem], *, written: dict[str, Any],
         space: Space | None = None, max_clarify: float = 0.25, folds: int = 5, seed: int = 20261202,
         max_settings: int = 24, repeats: int = 1, progress: bool = False) -> TuneResult:
    """Choose stage settings and gate thresholds on ``items``; ``written`` is the configuration
    as the user wrote it (${VARIABLES} unexpanded), into which the choice is written.

    With ``repeats`` above 1 the cross-validation runs again on other random splits (seeds
    ``seed + 1``, ...; the settings tried stay the same) and the held-out numbers pool them all:
    one split's wrong-accept rate moves by a point or more with the split alone.
    """
    loaded = with_gate(loaded)
    position = deciding_spec(loaded)
    if position is None:  # with_gate adds one; only a registry without "gate" gets here
        raise ConfigError("no stage in the chain provides decision, and the built-in gate is not available")
    gate_spec = loaded.config.stages[position]
    if not issubclass(Registry().get(gate_spec.name).Settings, GateSettings):
        raise ConfigError(f"stage {gate_spec.name} decides, but tune can refit only the built-in gate's settings")
    builder = VariantBuilder(loaded, progress=progress)
    usable = usable_space(DEFAULT_SPACE if space is None else space, builder, gate=gate_spec.name)
    settings = expand_space(usable, max_settings=max_settings, seed=seed)
    if repeats < 1:
        raise ValueError(f"repeats must be at least 1, got {repeats}")
    runs = [run_corpus(builder.chain(overrides), items, progress=False)
            for overrides in tqdm(settings, desc="settings", unit="run", disable=not progress)]
    recorded = [RecordedFeatures(outcomes) for outcomes in runs]
    base_gate = GateSettings.model_validate(gate_spec.params)

    def score(choice: Any, test: np.ndarray) -> Summary:
        chosen = [runs[choice.setting][i] for i in test]
        return summarize(chosen, decisions=decisions_for(chosen, gate_settings(base_gate, choice.gate)))

    results = []
    for repeat in range(repeats):
        splits = make_folds(len(items), folds, seed + repeat)
        for result in cross_validate(splits, lambda train: fit(recorded, train, max_clarify=max_clarify), score):
            results.append(replace(result, fold=repeat * folds + result.fold))
    held_out = held_out_summary(runs, results, base_gate)

    def at_budget(budget: float) -> Summary:
        splits = make_folds(len(items), folds, seed)
        return held_out_summary(runs, list(cross_validate(
            splits, lambda train: fit(recorded, train, max_clarify=budget), score)), base_gate)

    final = fit(recorded, np.arange(len(items)), max_clarify=max_clarify)
    dumped = gate_settings(base_gate, final.gate).model_dump(mode="json")
    extra = ("reprompt_confidence",) if "accept_confidence" in final.gate else ()
    gate_params = {**gate_spec.params, **{k: dumped[k] for k in
                   (*final.gate, "reprompt_posterior", "reprompt_entity", *extra)}}
    stages = list(written.get("stages") or [])
    if not any((item if isinstance(item, str) else next(iter(item))) == gate_spec.name for item in stages):
        stages.append(gate_spec.name)
    overrides = {**settings[final.setting], gate_spec.name: gate_params}
    config = with_overrides({**written, "stages": stages}, overrides)
    return TuneResult(settings=settings, space=usable, folds=results, held_out=held_out, config=config,
                      stages=config["stages"], at_budget=at_budget)

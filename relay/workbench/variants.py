"""Chains that differ from a configuration only in some stages' parameters.

`tune` tries many parameter settings; building a chain per setting from scratch would load
every lexicon and model again each time. Stages are cached by their exact parameters, so a
stage is constructed and loaded once per distinct setting and shared by every chain using it.

A parameter is addressed by its name at the top of the stage's settings (``max_span_words``)
or, inside a group, by its dotted name (``general.min_score``); a name the stage's settings
had before they were grouped means its new place.
"""

from __future__ import annotations

import contextlib
import copy
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import orjson
from pydantic import ValidationError

from relay.core.chain import Chain
from relay.core.config import LoadedConfig, parse_config
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.setting_names import OldNameConflict, move_old_names, old_names_of, set_dotted, setting_fields
from relay.core.stage import Stage
from relay.core.yamlsource import Located

__all__ = ["Overrides", "VariantBuilder", "apply_overrides", "config_from_dict", "with_overrides"]

# stage name -> parameter (top-level or dotted name) -> value
Overrides = dict[str, dict[str, Any]]


def config_from_dict(value: dict[str, Any], *, base_dir: Path, label: str = "<in memory>") -> LoadedConfig:
    """Validate a configuration held as a dict (same rules as a YAML file)."""
    return parse_config(Located(file=label, value=value), base_dir=base_dir)


def apply_overrides(params: dict[str, Any], overrides: dict[str, Any], old_names: Mapping[str, str]) -> dict[str, Any]:
    """A copy of one stage's parameters with ``overrides`` (top-level or dotted names) set.

    Old names, in the parameters and in the overrides, are first moved to their new places, so
    an override replaces the value it means instead of standing beside it under another name.
    """
    out = copy.deepcopy(params)
    # Parameters that contradict themselves stay as written: validating them names both places.
    if overrides:
        with contextlib.suppress(OldNameConflict):
            out, _ = move_old_names(out, old_names)
    for name, value in overrides.items():
        out = set_dotted(out, old_names.get(name, name), value)
    return out


def _old_names(registry: Registry, name: str) -> Mapping[str, str]:
    try:
        return old_names_of(registry.get(name).Settings)
    except ConfigError:
        return {}  # a stage that cannot be imported: its parameters are taken as written


def with_overrides(raw: dict[str, Any], overrides: Overrides, *, registry: Registry | None = None) -> dict[str, Any]:
    """A copy of a raw configuration dict with stage parameters replaced, addressed by stage name."""
    out = copy.deepcopy(raw)
    stages = []
    for item in out.get("stages") or []:
        name, params = (item, {}) if isinstance(item, str) else next(iter(item.items()))
        changes = overrides.get(name, {})
        if changes:
            registry = registry or Registry()
            params = apply_overrides(dict(params or {}), changes, _old_names(registry, name))
        stages.append({name: params} if params else name)
    out["stages"] = stages
    return out


class VariantBuilder:
    """Builds loaded chains from one configuration with per-stage overrides."""

    def __init__(self, loaded: LoadedConfig, *, registry: Registry | None = None, progress: bool = False) -> None:
        self.loaded = loaded
        self.registry = registry or Registry()
        self.context = loaded.context(progress=progress)
        self._stages: dict[bytes, Stage] = {}

    @property
    def stage_names(self) -> list[str]:
        return [spec.name for spec in self.loaded.config.stages]

    def settings_fields(self, name: str) -> set[str]:
        """The parameter names stage ``name`` accepts, a group's by dotted name (empty when the
        stage cannot be imported)."""
        try:
            return {field for field, _ in setting_fields(self.registry.get(name).Settings)}
        except ConfigError:
            return set()

    def current_name(self, name: str, parameter: str) -> str:
        """The name ``parameter`` of stage ``name`` goes by now (itself unless it is an old name)."""
        return _old_names(self.registry, name).get(parameter, parameter)

    def chain(self, overrides: Overrides) -> Chain:
        stages = []
        for spec in self.loaded.config.stages:
            params = apply_overrides(spec.params, overrides.get(spec.name, {}), _old_names(self.registry, spec.name))
            key = orjson.dumps([spec.index, spec.name, params], option=orjson.OPT_SORT_KEYS, default=str)
            stage = self._stages.get(key)
            if stage is None:
                cls = self.registry.get(spec.name)
                try:
                    settings = cls.Settings.model_validate(params)
                except ValidationError as exc:
                    problems = [f"stages[{spec.index}] ({spec.name}) -> {'.'.join(map(str, e['loc']))}: {e['msg']}"
                                for e in exc.errors()]
                    raise ConfigError(f"Invalid tuned parameters for stage {spec.name}", problems) from None
                stage = cls(settings, context=self.context)
                stage.load()
                self._stages[key] = stage
            stages.append(stage)
        return Chain(stages)

"""Chains that differ from a configuration only in some stages' parameters.

`tune` tries many parameter settings; building a chain per setting from scratch would load
every lexicon and model again each time. Stages are cached by their exact parameters, so a
stage is constructed and loaded once per distinct setting and shared by every chain using it.
"""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import orjson
from pydantic import ValidationError

from relay.core.chain import Chain
from relay.core.config import LoadedConfig, parse_config
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.stage import Stage
from relay.core.yamlsource import Located

__all__ = ["Overrides", "VariantBuilder", "config_from_dict", "with_overrides"]

# stage name -> parameter -> value
Overrides = dict[str, dict[str, Any]]


def config_from_dict(value: dict[str, Any], *, base_dir: Path, label: str = "<in memory>") -> LoadedConfig:
    """Validate a configuration held as a dict (same rules as a YAML file)."""
    return parse_config(Located(file=label, value=value), base_dir=base_dir)


def with_overrides(raw: dict[str, Any], overrides: Overrides) -> dict[str, Any]:
    """A copy of a raw configuration dict with stage parameters replaced, addressed by stage name."""
    out = copy.deepcopy(raw)
    stages = []
    for item in out.get("stages") or []:
        name, params = (item, {}) if isinstance(item, str) else next(iter(item.items()))
        params = dict(params or {})
        params.update(overrides.get(name, {}))
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
        """The parameter names stage ``name`` accepts (empty when it cannot be imported)."""
        try:
            return set(self.registry.get(name).Settings.model_fields)
        except ConfigError:
            return set()

    def chain(self, overrides: Overrides) -> Chain:
        stages = []
        for spec in self.loaded.config.stages:
            params = {**spec.params, **overrides.get(spec.name, {})}
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

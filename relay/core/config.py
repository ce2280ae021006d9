"""The relay's configuration: YAML validated into pydantic models, stage by stage.

Every problem is reported with its file and line, the field, the bad value and what is
allowed, all at once, as a ConfigError; no user sees a raw pydantic traceback.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pydantic import BaseModel, Field, ValidationError

from relay.core.chain import Chain
from relay.core.domain import Domain, DomainSettings
from relay.core.errors import ConfigError
from relay.core.fieldmap import FieldMap
from relay.core.registry import Registry
from relay.core.setting_names import OldNameConflict, group_model, old_names_of
from relay.core.settings import (
    BrokerSettings,
    CaptureSettings,
    LimitSettings,
    LogSettings,
    MetricsSettings,
    TopicSettings,
    _Strict,
)
from relay.core.stage import Stage, StageContext, check_order
from relay.core.yamlsource import Located, load_yaml

__all__ = ["LoadedConfig", "RelayConfig", "StageSpec", "build_chain", "load_config", "parse_config"]


class StageSpec(BaseModel):
    """One entry of the ``stages:`` list, parameters still unvalidated."""

    name: str
    params: dict[str, Any]
    index: int


class RelayConfig(_Strict):
    broker: BrokerSettings = BrokerSettings()
    topics: TopicSettings = TopicSettings()
    limits: LimitSettings = LimitSettings()
    metrics: MetricsSettings = MetricsSettings()
    logging: LogSettings = LogSettings()
    capture: CaptureSettings = CaptureSettings()
    fields: FieldMap = Field(default_factory=FieldMap)
    domain: DomainSettings = DomainSettings()
    cache_dir: str = ".rehear-cache"
    stages: list[StageSpec] = Field(default_factory=list)


@dataclass
class LoadedConfig:
    """A validated configuration with where it came from."""

    config: RelayConfig
    source: Located
    base_dir: Path
    hash: str

    def where(self, *path: str | int) -> str:
        return self.source.where(tuple(path))

    @property
    def domain(self) -> Domain:
        return Domain.from_settings(self.config.domain, self.base_dir)

    def context(self, *, progress: bool = False) -> StageContext:
        """What every stage of this configuration is constructed with."""
        return StageContext(base_dir=self.base_dir, cache_dir=self.base_dir / self.config.cache_dir,
                            progress=progress, domain=self.domain)


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _valid_names(model: type[BaseModel] | None, loc: tuple[Any, ...]) -> list[str]:
    """The settings a model accepts at ``loc`` (a group's inside the group), for "unknown setting"."""
    for part in loc:
        field = model.model_fields.get(str(part)) if model is not None else None
        group = group_model(field.annotation) if field is not None else None
        if group is not None:
            model = group
        elif field is not None:
            return []  # inside a mapping of free keys: no list to give
    return sorted(model.model_fields) if model is not None else []


def _pydantic_problems(error: ValidationError, source: Located, prefix: tuple[str | int, ...], label: str,
                       *, written: Mapping[tuple[str, ...], str] | None = None,
                       model: type[BaseModel] | None = None) -> list[str]:
    """One line per problem, at the line of the value. ``written`` maps the dotted place of a
    setting given under its old name to that name, so its problems point at what was written."""
    problems = []
    for item in error.errors():
        loc = tuple(item["loc"])
        conflict = (item.get("ctx") or {}).get("error")
        if isinstance(conflict, OldNameConflict):
            problems += [f"{source.where(prefix + (old,))} {label}{old}: the old name of {new}, which is given "
                         f"too; keep only {new}" for old, new in conflict.pairs]
            continue
        field = ".".join(str(part) for part in loc) or "(top level)"
        for path, old in (written or {}).items():
            if loc[:len(path)] == path:
                loc = (old, *loc[len(path):])
                field += f" (written as {old})"
                break
        got = "" if item["type"] == "missing" else f", got {_shown(item.get('input'))}"
        message = item["msg"].removeprefix("Value error, ")
        valid = ""
        if item["type"] == "extra_forbidden":
            message = "unknown setting"
            names = _valid_names(model, tuple(item["loc"])[:-1])
            valid = f" (valid: {', '.join(names)})" if names else ""
        problems.append(f"{source.where(prefix + loc)} {label}{field}: {message}{got}{valid}")
    return problems


def _stage_specs(source: Located, raw: Any) -> tuple[list[dict[str, Any]], list[str]]:
    specs: list[dict[str, Any]] = []
    problems: list[str] = []
    if raw is None:
        return specs, problems
    if not isinstance(raw, list):
        return specs, [f"{source.where(('stages',))} stages: must be a list of stage names or one-key mappings"]
    for index, item in enumerate(raw):
        where = source.where(("stages", index))
        if isinstance(item, str):
            specs.append({"name": item, "params": {}, "index": index})
        elif isinstance(item, dict) and len(item) == 1:
            name, params = next(iter(item.items()))
            if params is None:
                params = {}
            if not isinstance(params, dict):
                problems.append(f"{where} stages[{index}] ({name}): parameters must be a mapping, got {_shown(params)}")
                continue
            specs.append({"name": str(name), "params": params, "index": index})
        else:
            problems.append(f"{where} stages[{index}]: write a stage as `- name` or `- name: {{params}}`, got {_shown(item)}")
    return specs, problems


def parse_config(source: Located, *, base_dir: Path) -> LoadedConfig:
    """Validate the top-level settings (not yet the stages' own parameters)."""
    if not isinstance(source.value, dict):
        raise ConfigError(f"Invalid configuration {source.file}", [f"{source.file}: the top level must be a mapping"])
    raw = dict(source.value)
    specs, problems = _stage_specs(source, raw.pop("stages", None))
    try:
        config = RelayConfig.model_validate({**raw, "stages": specs})
    except ValidationError as exc:
        problems += _pydantic_problems(exc, source, (), "", model=RelayConfig)
        config = None
    if problems or config is None:
        raise ConfigError(f"Invalid configuration {source.file}", problems)
    digest = hashlib.sha256(repr(source.value).encode()).hexdigest()[:12]
    return LoadedConfig(config=config, source=source, base_dir=base_dir, hash=digest)


def load_config(path: str | Path, *, env: Mapping[str, str] | None = None) -> LoadedConfig:
    path = Path(path)
    return parse_config(load_yaml(path, env=env), base_dir=path.resolve().parent)


def build_chain(loaded: LoadedConfig, *, registry: Registry | None = None, progress: bool = False) -> Chain:
    """Validate every stage's parameters, check the order, construct the stages (not loaded)."""
    registry = registry or Registry()
    source = loaded.source
    problems: list[str] = []
    stages: list[Stage] = []
    context = loaded.context(progress=progress)
    for spec in loaded.config.stages:
        label = f"stages[{spec.index}] ({spec.name}) -> "
        try:
            cls = registry.get(spec.name)
        except ConfigError as exc:
            problems.append(f"{source.where(('stages', spec.index))} stages[{spec.index}]: {exc.title}; "
                            + "; ".join(exc.problems))
            continue
        try:
            settings = cls.Settings.model_validate(spec.params)
        except ValidationError as exc:
            written = {tuple(new.split(".")): old for old, new in old_names_of(cls.Settings).items()
                       if old in spec.params}
            problems += _pydantic_problems(exc, source, ("stages", spec.index, spec.name), label, written=written,
                                           model=cls.Settings)
            continue
        try:
            stages.append(cls(settings, context=context))
        except ConfigError as exc:  # e.g. a file neither the stage nor domain: names
            problems.append(f"{source.where(('stages', spec.index))} {label}{exc.title}"
                            + "".join(f"; {p}" for p in exc.problems))
    if problems:
        raise ConfigError(f"Invalid stage settings in {source.file}", problems)
    if not stages:
        raise ConfigError(f"Invalid configuration {source.file}", [f"{source.file}: stages: the chain names no stage"])
    check_order(stages, location=lambda i: f"{source.where(('stages', loaded.config.stages[i].index))} "
                f"stages[{loaded.config.stages[i].index}] ({stages[i].name})")
    return Chain(stages)

"""Stages by name: the built-in catalogue, third-party stages from an entry-point group, and
classes registered at run time. Built-ins are imported on first use, so a stage's heavy
dependencies load only when a chain names it.
"""

from __future__ import annotations

import importlib
import re
from importlib.metadata import entry_points

from relay.core.errors import ConfigError
from relay.core.stage import Stage

__all__ = ["ENTRY_POINT_GROUP", "Registry"]

ENTRY_POINT_GROUP = "rehear.stages"
_NAME = re.compile(r"^[a-z0-9_]+$")

# The one place built-in stages are registered.
_BUILTIN: dict[str, str] = {
    "normalize": "stages.normalize.stage:NormalizeStage",
    "lm_rescore": "stages.lm.rescore:LmRescoreStage",
    "lexicon": "stages.lexicon.stage:LexiconStage",
    "gate": "stages.gate.stage:GateStage",
}


def _import(target: str) -> type[Stage]:
    module_name, _, attr = target.partition(":")
    cls: type[Stage] = getattr(importlib.import_module(module_name), attr)
    return cls


class Registry:
    """Maps stage names to stage classes."""

    def __init__(self, *, builtins: bool = True, plugins: bool = True) -> None:
        self._targets: dict[str, str] = dict(_BUILTIN) if builtins else {}
        self._classes: dict[str, type[Stage]] = {}
        if plugins:
            clashes = []
            for point in entry_points(group=ENTRY_POINT_GROUP):
                taken = self._targets.get(point.name)
                if taken is not None and taken != point.value:
                    clashes.append(f"{point.name!r} from {point.value} is already {taken}")
                    continue
                self._targets[point.name] = point.value
            if clashes:
                # Silently preferring one would run a different stage than the configuration's
                # author meant; which one depends on install order.
                raise ConfigError(f"Stage names declared twice in the {ENTRY_POINT_GROUP!r} entry-point group",
                                  [*clashes, "rename the plug-in's entry point in its package's pyproject.toml"])

    def register(self, cls: type[Stage]) -> type[Stage]:
        """Add a stage class under its ``name``; usable as a class decorator."""
        name = getattr(cls, "name", None)
        if not isinstance(name, str) or not _NAME.match(name):
            raise ConfigError(f"Stage class {cls.__qualname__} has an invalid name {name!r}",
                              ["a stage name is made of a-z, 0-9 and _"])
        known = self._classes.get(name)
        if known is None and name in self._targets:
            known = self.get(name)
        if known is not None and known is not cls:
            raise ConfigError(f"Stage name {name!r} is taken by {known.__module__}.{known.__qualname__}")
        self._classes[name] = cls
        return cls

    def names(self) -> list[str]:
        return sorted(set(self._targets) | set(self._classes))

    def get(self, name: str) -> type[Stage]:
        """The class registered under ``name``; ConfigError listing the valid names if none."""
        if name in self._classes:
            return self._classes[name]
        target = self._targets.get(name)
        if target is None:
            raise ConfigError(f"Unknown stage {name!r}", [f"valid stages: {', '.join(self.names())}"])
        try:
            cls = _import(target)
        except (ImportError, AttributeError) as exc:
            raise ConfigError(f"Stage {name!r} could not be imported from {target}", [str(exc)]) from None
        self._classes[name] = cls
        return cls

"""Stages a test defines for itself: the part each writes the same way (settings kept, nothing to
load), and a registry that holds them."""

from __future__ import annotations

from typing import Any, ClassVar

from pydantic import BaseModel, ConfigDict

from relay.core.registry import Registry
from relay.core.stage import StageContext

__all__ = ["NoSettings", "PlainStage", "registry_of"]


class NoSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")


class PlainStage:
    """A stage with no settings, no capabilities and nothing to load.

    A subclass gives its ``name`` and ``process``, and its own ``Settings``, ``needs``,
    ``provides`` or ``load`` where it has them; its settings are kept in ``self.settings``.
    """

    Settings: ClassVar[type[BaseModel]] = NoSettings
    needs: ClassVar[frozenset[str]] = frozenset()
    provides: ClassVar[frozenset[str]] = frozenset()

    def __init__(self, settings: Any, *, context: StageContext) -> None:
        self.settings = settings

    def load(self) -> None:
        pass


def registry_of(*stages: type) -> Registry:
    """The stage registry with a test's own stages added."""
    registry = Registry()
    for stage in stages:
        registry.register(stage)
    return registry

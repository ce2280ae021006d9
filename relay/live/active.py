"""A configuration with its loaded chain: what the relay runs, replaced as a whole on reload."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from relay.core.chain import Chain
from relay.core.config import LoadedConfig, build_chain, load_config

__all__ = ["Active", "load_active"]


@dataclass(frozen=True, slots=True)
class Active:
    """A configuration with its loaded chain; replaced as a whole on reload."""

    loaded: LoadedConfig
    chain: Chain


def load_active(path: str | Path, *, progress: bool = False) -> Active:
    """Read, validate, build and load; slow (stages load models), so run it off the loop."""
    loaded = load_config(path)
    chain = build_chain(loaded, progress=progress)
    chain.load()
    return Active(loaded, chain)

"""Freezing the loaded chain out of the garbage collector's walks, and undoing it on reload."""

from __future__ import annotations

import asyncio
import gc
import weakref
from collections.abc import Iterator
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from relay.core.config import build_chain
from relay.live.active import Active
from relay.live.heap import freeze_loaded, refreeze_when_gone
from relay.live.metrics import Metrics
from relay.live.service import Relay
from relay.workbench.variants import config_from_dict


class Node:
    def __init__(self) -> None:
        self.me = self  # a reference cycle: only the collector frees it


@pytest.fixture(autouse=True)
def unfrozen() -> Iterator[None]:
    yield
    gc.unfreeze()  # the rest of the test session must not inherit a frozen heap


def test_freezing_exempts_what_is_alive_and_refreezing_frees_a_replaced_cycle() -> None:
    node = Node()
    alive = weakref.ref(node)
    freeze_loaded()
    assert gc.get_freeze_count() > 0
    del node
    gc.collect()
    assert alive() is not None  # frozen: the collector no longer looks at it

    async def refreeze() -> bool:
        held = alive()
        assert held is not None
        waiting = refreeze_when_gone(held, timeout_s=2.0, poll_s=0.01)
        del held
        return await waiting

    assert asyncio.run(refreeze())
    assert alive() is None
    assert gc.get_freeze_count() > 0


def test_a_chain_still_in_use_leaves_the_heap_unfrozen() -> None:
    freeze_loaded()
    held = Node()
    assert not asyncio.run(refreeze_when_gone(held, timeout_s=0.1, poll_s=0.01))
    assert gc.get_freeze_count() == 0


def test_reload_refreezes_once_the_replaced_chain_is_gone(tmp_path: Path) -> None:
    def active() -> Active:
        loaded = config_from_dict({"stages": ["normalize", "gate"], "limits": {"drain_s": 2}}, base_dir=tmp_path)
        chain = build_chain(loaded)
        chain.load()
        return Active(loaded, chain)

    async def scenario() -> weakref.ref[object]:
        relay = Relay(active(), Metrics(CollectorRegistry()), reloader=active, freeze_heap=True)
        old = weakref.ref(relay.active.chain)
        freeze_loaded()
        assert await relay.reload()
        await asyncio.gather(*relay._background)
        return old

    old = asyncio.run(scenario())
    assert old() is None
    assert gc.get_freeze_count() > 0

"""How long input has waited unacknowledged (Relay.ack_stall), read by the gauge and /healthz.

The broker side is in tests/integration/test_faults.py (scenarios 1 and 3); these tests set the
relay's state by hand, with no broker.
"""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from types import SimpleNamespace

from prometheus_client import CollectorRegistry

from relay.core.config import build_chain
from relay.live.active import Active
from relay.live.metrics import Metrics
from relay.live.service import Relay
from relay.live.transport import AckQueue, Delivery
from relay.workbench.variants import config_from_dict

LONG_AGO_S = 100.0  # far beyond limits.stall_s below, so the answers do not depend on the clock


def _relay(tmp_path: Path) -> tuple[Relay, CollectorRegistry]:
    loaded = config_from_dict({"stages": ["normalize", "gate"], "limits": {"stall_s": 5}}, base_dir=tmp_path)
    chain = build_chain(loaded)
    chain.load()
    registry = CollectorRegistry()
    return Relay(Active(loaded, chain), Metrics(registry)), registry


def _session(*pending: Delivery) -> SimpleNamespace:
    acks = AckQueue()
    for delivery in pending:
        acks.add(delivery)
    return SimpleNamespace(acks=acks)


def _delivery(mid: int) -> Delivery:
    return Delivery(topic="t/asr/k/nbest", payload=b"{}", qos=1, mid=mid, generation=2)


def test_reading_the_stall_does_not_change_later_answers(tmp_path: Path) -> None:
    # Reconnected, before the broker delivers again the input that went back: nothing is in
    # flight, so the stall reads 0. Once that input is in flight again it is the same stall
    # ("an input the broker redelivers again and again is one stall", Relay.__init__), whether
    # or not a scrape or a /healthz request looked in between.
    since = time.monotonic() - LONG_AGO_S
    (read, registry), (unread, _) = _relay(tmp_path), _relay(tmp_path)
    for relay in (read, unread):
        relay.connected = True
        relay._waiting_since = since
    assert registry.get_sample_value("rehear_ack_stall_seconds") == 0.0
    ok, _detail = read.health()
    assert ok
    for relay in (read, unread):
        relay._session = _session(_delivery(1))  # type: ignore[assignment]
    assert registry.get_sample_value("rehear_ack_stall_seconds") >= LONG_AGO_S
    assert read.ack_stall() >= LONG_AGO_S and unread.ack_stall() >= LONG_AGO_S
    ok, detail = read.health()
    assert not ok and "acknowledgements stalled" in detail


def test_the_wait_is_forgotten_when_the_last_task_ends_with_nothing_to_acknowledge(tmp_path: Path) -> None:
    relay, _ = _relay(tmp_path)
    relay.connected = True
    waiting = _delivery(1)
    relay._session = _session(waiting)  # type: ignore[assignment]

    async def one_task() -> None:
        task = asyncio.create_task(asyncio.sleep(0))
        relay._tasks.add(task)
        task.add_done_callback(relay._finished)
        await task
        await asyncio.sleep(0)  # the done callback runs on the next turn of the loop

    # A task ends while an input still waits to be acknowledged: the wait goes on.
    relay._waiting_since = time.monotonic() - LONG_AGO_S
    asyncio.run(one_task())
    assert relay._waiting_since is not None and relay.ack_stall() >= LONG_AGO_S
    # The last task ends and nothing is left to acknowledge: the next input's wait starts afresh.
    relay._session.acks.pending.clear()
    asyncio.run(one_task())
    assert relay._waiting_since is None
    relay._session = _session(_delivery(2))  # type: ignore[assignment]
    assert relay.ack_stall() < LONG_AGO_S

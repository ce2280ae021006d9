"""The chain worker: results, errors and the deadline, on a real event loop and thread."""

from __future__ import annotations

import asyncio
import threading
import time

import pytest

from relay.live.worker import ChainWorker


def test_results_come_back_in_order_from_one_thread() -> None:
    async def scenario() -> list[tuple[int, str]]:
        worker = ChainWorker()
        deadline = time.monotonic() + 5
        calls = [worker.run(lambda n=n: (n, threading.current_thread().name), deadline) for n in range(200)]
        try:
            return await asyncio.gather(*calls)
        finally:
            worker.shutdown()

    results = asyncio.run(scenario())
    assert [n for n, _ in results] == list(range(200))
    assert {name for _, name in results} == {"rehear-chain"}


def test_an_exception_reaches_the_caller() -> None:
    def broken() -> None:
        raise ValueError("stage bug")

    async def scenario() -> None:
        worker = ChainWorker()
        try:
            with pytest.raises(ValueError, match="stage bug"):
                await worker.run(broken, time.monotonic() + 5)
            assert await worker.run(lambda: 7, time.monotonic() + 5) == 7  # still serving
        finally:
            worker.shutdown()

    asyncio.run(scenario())


def test_the_deadline_holds_while_a_job_is_stuck_and_queued_jobs_expire() -> None:
    release = threading.Event()
    ran: list[str] = []

    def stuck() -> str:
        release.wait(5)
        ran.append("stuck")
        return "late"

    def queued() -> str:
        ran.append("queued")
        return "never"

    async def scenario() -> tuple[float, float]:
        worker = ChainWorker()
        try:
            start = time.monotonic()
            first = asyncio.ensure_future(worker.run(stuck, start + 0.05))
            second = asyncio.ensure_future(worker.run(queued, start + 0.1))
            with pytest.raises(TimeoutError):
                await first
            first_at = time.monotonic() - start
            with pytest.raises(TimeoutError):
                await second
            second_at = time.monotonic() - start
            release.set()
            # the worker skipped the expired job and serves the next one
            assert await worker.run(lambda: "next", time.monotonic() + 5) == "next"
            return first_at, second_at
        finally:
            release.set()
            worker.shutdown()

    first_at, second_at = asyncio.run(scenario())
    assert 0.04 <= first_at < 1.0
    assert 0.09 <= second_at < 1.0
    assert ran == ["stuck"]

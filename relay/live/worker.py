"""One worker thread that runs the stage chain off the event loop, cheaply per message.

``loop.run_in_executor`` plus ``asyncio.wait_for`` cost about 80-100 us per message on the
development machine (a Future with a Condition, a wrapping asyncio Future, a timer and one
self-pipe write per result). Here a job is a plain tuple on a SimpleQueue, the result comes back
on a deque, and the loop is woken at most once for all results that finished meanwhile: under
load one wake-up serves several messages, and no result ever waits for another one.

The deadline stays with the caller: ``run`` raises TimeoutError when it passes, even while a
stage is stuck; the worker skips jobs whose deadline passed while they were queued.
"""

from __future__ import annotations

import asyncio
import collections
import queue
import threading
import time
from collections.abc import Callable
from typing import Any

__all__ = ["ChainWorker"]

_STOP = object()


class ChainWorker:
    """Runs ``fn()`` calls one at a time on a daemon thread; ``await run(fn, deadline)``."""

    def __init__(self, name: str = "rehear-chain") -> None:
        self._jobs: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._done: collections.deque[tuple[asyncio.Future[Any], bool, Any]] = collections.deque()
        self._wake_pending = False
        self._name = name
        self._started = False

    async def run(self, fn: Callable[[], Any], deadline: float) -> Any:
        """``fn()`` on the worker thread; TimeoutError once ``time.monotonic()`` passes ``deadline``."""
        loop = asyncio.get_running_loop()
        if not self._started:
            self._started = True
            threading.Thread(target=self._work, args=(loop,), name=self._name, daemon=True).start()
        future: asyncio.Future[Any] = loop.create_future()
        timer = loop.call_later(max(0.0, deadline - time.monotonic()), _expire, future)
        self._jobs.put((fn, deadline, future))
        try:
            return await future
        finally:
            timer.cancel()

    def shutdown(self) -> None:
        """Let the thread end once the jobs queued so far are done or expired.

        The thread is a daemon: a stage stuck at exit does not keep the process alive.
        """
        if self._started:
            self._jobs.put(_STOP)

    # ---- worker thread -------------------------------------------------------------------

    def _work(self, loop: asyncio.AbstractEventLoop) -> None:
        while True:
            job = self._jobs.get()
            if job is _STOP:
                return
            fn, deadline, future = job
            if future.done() or time.monotonic() > deadline:
                continue  # the caller has already forwarded the original
            try:
                result, ok = fn(), True
            except BaseException as exc:  # noqa: BLE001 - handed to the caller as is
                result, ok = exc, False
            self._done.append((future, ok, result))
            if not self._wake_pending:
                # One wake-up for every result that lands before the loop runs _deliver.
                self._wake_pending = True
                try:
                    loop.call_soon_threadsafe(self._deliver)
                except RuntimeError:
                    return  # the loop is closed: nobody waits for results any more

    # ---- event loop ----------------------------------------------------------------------

    def _deliver(self) -> None:
        self._wake_pending = False  # before draining: a result appended from now on wakes again
        while self._done:
            future, ok, result = self._done.popleft()
            if future.done():
                continue  # timed out meanwhile
            if ok:
                future.set_result(result)
            else:
                future.set_exception(result)


def _expire(future: asyncio.Future[Any]) -> None:
    if not future.done():
        future.set_exception(TimeoutError())

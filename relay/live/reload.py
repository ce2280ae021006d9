"""Reloads one at a time, the last request winning.

A SIGHUP that arrives while a reload is still loading (lexicons and models take seconds) must
not start a second load beside it: two loads at once double the memory, and whichever finishes
last would win, possibly the older file. Here loads run one after the other; a request made
while a load runs makes that load stale (the file may have changed since it was read), so its
result is dropped and the file read again.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable
from typing import Generic, TypeVar

from relay.core.errors import RehearError

__all__ = ["SerialReloads"]

_log = logging.getLogger("rehear.service")
T = TypeVar("T")


class SerialReloads(Generic[T]):
    """``await request()`` loads with ``load`` off the loop and hands a current result to ``apply``."""

    def __init__(self, load: Callable[[], T], apply: Callable[[T], None], *,
                 counted: Callable[[str], None] = lambda result: None) -> None:
        """``counted(result)`` is told of every outcome: ok, failed or superseded."""
        self._load = load
        self._apply = apply
        self._counted = counted
        self._lock = asyncio.Lock()
        self._requests = 0
        self._done = 0
        self._result = False

    async def request(self) -> bool:
        """True once a configuration read after this request is serving; False when the last
        one read could not be loaded (the running one stays)."""
        self._requests += 1
        mine = self._requests
        async with self._lock:
            while self._done < mine:
                target = self._requests
                try:
                    new = await asyncio.get_running_loop().run_in_executor(None, self._load)
                except RehearError as exc:
                    if self._requests == target:
                        self._done, self._result = target, False
                    self._counted("failed")
                    _log.error("reload failed; the current chain keeps running\n%s", exc)
                    continue
                if self._requests != target:
                    self._counted("superseded")
                    _log.info("reload superseded by a newer request; reading the file again")
                    continue
                self._apply(new)
                self._counted("ok")
                self._done, self._result = target, True
            return self._result

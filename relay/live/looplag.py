"""How late the event loop runs: a timer that measures its own lateness.

The loop reads from the broker, sends acknowledgements and answers /healthz. When the chain's
thread holds the interpreter (a stage in pure Python on a long message), or a stage runs on the
loop itself, everything on the loop waits; this shows how long, as a histogram.
"""

from __future__ import annotations

import asyncio
from typing import Any

__all__ = ["watch_loop_lag"]


async def watch_loop_lag(histogram: Any, *, interval_s: float = 0.1) -> None:
    """Observe, every ``interval_s``, how much later than asked the loop woke; runs until cancelled."""
    loop = asyncio.get_running_loop()
    while True:
        asked = loop.time() + interval_s
        await asyncio.sleep(interval_s)
        histogram.observe(max(0.0, loop.time() - asked))

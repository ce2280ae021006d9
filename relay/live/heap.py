"""Keep the loaded chain out of the cyclic garbage collector's way.

A loaded lexicon and language model are millions of long-lived Python objects, and CPython's
oldest-generation collection walks all of them: with a 10k-entry lexicon that is a 30-70 ms
pause inside some message, about once every few hundred messages. ``gc.freeze()`` after the
chain is loaded moves everything alive into a permanent generation the collector skips; what
the relay allocates per message is collected as before.

A reload must undo it, or the replaced chain's reference cycles would be kept for good: the
heap is unfrozen at the swap and frozen again once the old chain is gone, that is once the
last message that started with it has finished. If it is still in use after the wait, the heap
stays unfrozen (collected as usual) until the next reload.
"""

from __future__ import annotations

import asyncio
import gc
import time
import weakref

__all__ = ["freeze_loaded", "refreeze_when_gone"]


def freeze_loaded() -> None:
    """Collect what loading left behind, then exempt everything alive from later collections."""
    gc.collect()
    gc.freeze()


async def refreeze_when_gone(old: object, *, timeout_s: float, poll_s: float = 0.05) -> bool:
    """Unfreeze now; freeze again when ``old`` has been freed. True if that happened in time.

    The caller must drop its own references to ``old`` after the call.
    """
    gc.unfreeze()
    gone = weakref.ref(old)
    del old
    began = time.monotonic()
    collected = False
    while gone() is not None:
        waited = time.monotonic() - began
        if waited >= timeout_s:
            return False
        if not collected and waited >= timeout_s / 2:
            gc.collect()  # the old chain may hold reference cycles that only a collection frees
            collected = True
            continue
        await asyncio.sleep(poll_s)
    freeze_loaded()
    return True

"""Keeping every token's counts in the daemon's memory (``ModelStore.preload``).

With the whole model in memory a token the cache lacks is known to have no counts, so judging
a message never reads the database: not the few new words of each message, nor the many of
every message after a restart.  A background task preloads at start and again, at most once a
``PRELOAD_EVERY``, after something ended it: another process's write (``mailweir train`` on
the same file), or a model grown past ``model.cache_tokens``.  Lookups read through the cache
meanwhile, as without preloading.  A model larger than ``model.cache_tokens`` gets a filter of
which tokens it holds instead, so that a token it lacks is not read (``store/presence.py``).
On a PostgreSQL model that several daemons share, each holds it and preloads again after
another's training (a correction, ``mailweir train``): daemons write only when they learn.
"""

from __future__ import annotations

import asyncio
import logging
import time
from typing import Any, Final, Literal

from mailweir.daemon.background import stop_task

log = logging.getLogger("mailweir.preload")

PRELOAD_EVERY: Final = 60.0  # seconds between tries while memory is not complete

MemoryState = Literal["counts", "presence", "none"]


def memory_state(store: Any) -> MemoryState:
    """What memory holds of the model: every token's counts, a filter of which tokens it
    holds (a model larger than ``model.cache_tokens``), or neither (tokens memory lacks are
    read; with ``model.preload`` off, or until the next preload after another process's
    write).  The metric and the status page both say it."""
    if store is None:
        return "none"
    if store.complete:
        return "counts"
    return "presence" if store.presence_known else "none"


class KeepPreloaded:
    def __init__(self, store: Any, every: float = PRELOAD_EVERY) -> None:
        self._store = store
        self._every = every
        self._task: asyncio.Task[None] | None = None
        self._reading: asyncio.Future[bool] | None = None  # a preload running in a thread

    def start(self) -> None:
        if self._task is None:
            self._task = asyncio.create_task(self._run(), name="mailweir-preload")

    async def stop(self) -> None:
        """End the task, and wait for a preload in its thread (the store closes next)."""
        await stop_task(self._task)
        self._task = None
        if self._reading is not None:
            await asyncio.gather(self._reading, return_exceptions=True)

    async def _run(self) -> None:
        while True:
            if not self._store.presence_known:
                await self._preload()
            await asyncio.sleep(self._every)

    async def _preload(self) -> None:
        started = time.monotonic()
        self._reading = asyncio.ensure_future(asyncio.to_thread(self._store.preload))
        try:
            done = await asyncio.shield(self._reading)
        except Exception:  # a cancellation (stop) passes through: it is not an Exception
            log.exception("preloading the token counts failed; lookups read through meanwhile")
            return
        finally:
            if self._reading.done():
                self._reading = None
        if done:
            log.info("token counts preloaded in %.2fs", time.monotonic() - started)
        elif self._store.presence_known:
            log.info(
                "model larger than model.cache_tokens: its tokens' presence filter built in %.2fs",
                time.monotonic() - started,
            )

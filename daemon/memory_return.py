"""Returning what a peak of mail left free to the operating system, a few seconds after it.

glibc keeps freed memory for the process's next allocations and gives back on its own only the
top end of its heap, so blocks freed beneath one still in use stay resident: in
``bench/bench_relay.py`` 100 KB mail after 4 KB mail grew the heap by 13 MB, and it stayed after
the load.  ``malloc_trim(0)`` hands back every whole free page.  It costs about 1 ms of CPU for
the daemon's heap (6 ms at most after 32 connections of 100 KB mail), so it runs in a thread,
every ``RETURN_EVERY`` seconds while mail comes and never while none does.

``bench/bench_relay.py``, 2 cores, 2026-12-03 01:51-02:05 UTC, two full runs each: 107-117 MB
PSS under the 100 KB load that follows the 4 KB load against 112-121 without (the budget is
119.9), 94-96 under 4 KB against 95-97, at the same CPU per message.  Figures are read as each
run ends, before the next return is due half the time; trimming every 2 s gave 105-112.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable
from typing import Final

from mailweir.daemon.background import stop_task
from mailweir.store.memory import release_free_memory

log = logging.getLogger("mailweir.memory")

RETURN_EVERY: Final = 5.0  # seconds between returns while mail comes


class ReturnFreeMemory:
    """Every ``every`` seconds, ``release()`` in a thread if ``activity()`` has moved since the
    last look (``activity``: any count that grows with the work done, e.g. messages judged)."""

    def __init__(
        self,
        activity: Callable[[], int],
        every: float = RETURN_EVERY,
        release: Callable[[], None] = release_free_memory,
    ) -> None:
        self._activity = activity
        self._every = every
        self._release = release
        self._task: asyncio.Task[None] | None = None

    def start(self) -> None:
        if self._task is None:
            seen = self._activity()  # now: the task itself first runs at the loop's next turn
            self._task = asyncio.create_task(self._run(seen), name="mailweir-memory-return")

    async def stop(self) -> None:
        await stop_task(self._task)
        self._task = None

    async def _run(self, seen: int) -> None:
        while True:
            await asyncio.sleep(self._every)
            now = self._activity()
            if now == seen:
                continue
            seen = now
            try:
                await asyncio.to_thread(self._release)
            except Exception:  # memory stays as it was; the daemon carries on
                log.exception("returning free memory to the system failed")

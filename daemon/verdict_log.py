"""The verdict log, written behind the message path.

The SMTP handler calls :meth:`VerdictLog.add` after it has answered; that only appends to a
queue.  A background task writes the queue in batches with ``store.record_verdicts`` in a
worker thread, every ``log.verdict_batch_seconds`` or as soon as ``batch_size`` records wait,
so no reply ever waits on this database write.

A failed write (a locked database) keeps the batch and tries again next round; only past
``max_pending`` records are the oldest dropped, and every drop is logged and counted, so a long
database outage costs log lines, never memory or mail.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import logging
import time
from typing import Any

log = logging.getLogger("mailweir.verdict_log")

# Each record carries its token hashes (a few hundred int64 values, a few KB); 100,000 of them
# is a few hundred MB at worst, the most a daemon should hold through a database outage.
MAX_PENDING = 100_000
BATCH_SIZE = 500
EXPIRE_EVERY = 3600.0  # seconds between sweeps of token hashes past the retention window


class VerdictLog:
    def __init__(
        self,
        store: Any,
        batch_seconds: float,
        batch_size: int = BATCH_SIZE,
        max_pending: int = MAX_PENDING,
        *,
        retention_days: float | None = None,
        expire_every: float = EXPIRE_EVERY,
    ) -> None:
        """``retention_days``: token hashes older than this are erased from the log (the
        verdict rows stay, for the rates); checked at start and every ``expire_every`` s."""
        self._store = store
        self._batch_seconds = batch_seconds
        self._batch_size = batch_size
        self._pending: collections.deque[Any] = collections.deque()
        self._max_pending = max_pending
        self._wake = asyncio.Event()
        self._task: asyncio.Task[None] | None = None
        self._closing = False
        self._retention_days = retention_days
        self._expire_every = expire_every
        self._next_expiry = 0.0  # monotonic time; 0: at the first round
        self.written = 0
        self.dropped = 0
        self.write_failures = 0

    @property
    def pending(self) -> int:
        return len(self._pending)

    def add(self, record: Any) -> None:
        """Queue one record; never blocks and never raises."""
        if len(self._pending) >= self._max_pending:
            self._pending.popleft()
            self.dropped += 1
            if self.dropped == 1 or self.dropped % 1000 == 0:
                log.error("verdict log backlog full: %d records dropped so far", self.dropped)
        self._pending.append(record)
        if len(self._pending) >= self._batch_size:
            self._wake.set()

    async def start(self) -> None:
        if self._task is None:
            self._task = asyncio.create_task(self._run(), name="mailweir-verdict-log")

    async def close(self) -> None:
        """Stop the background task and write everything still queued (one last try)."""
        self._closing = True
        if self._task is not None:
            self._wake.set()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._task = None
        while self._pending:
            if not await self._write_batch():
                log.error("verdict log closed with %d records unwritten", len(self._pending))
                self.dropped += len(self._pending)
                self._pending.clear()

    async def flush(self) -> None:
        """Write what is queued now (tests, and before a planned pause)."""
        while self._pending and await self._write_batch():
            pass

    async def _run(self) -> None:
        while not self._closing:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._wake.wait(), self._batch_seconds)
            self._wake.clear()
            # Write whole batches while they are full, then the remainder once per period.
            while self._pending and not self._closing:
                if not await self._write_batch() or len(self._pending) < self._batch_size:
                    break
            if self._retention_days is not None and time.monotonic() >= self._next_expiry:
                self._next_expiry = time.monotonic() + self._expire_every
                await self._expire()

    async def _expire(self) -> None:
        assert self._retention_days is not None
        cutoff = time.time() - self._retention_days * 86400
        try:
            erased = await asyncio.to_thread(self._store.expire_verdict_tokens, cutoff)
        except Exception:
            log.exception("erasing token hashes past the retention window failed; will retry")
            return
        if erased:
            log.info("erased token hashes of %d verdicts past the retention window", erased)

    async def _write_batch(self) -> bool:
        batch = [self._pending.popleft() for _ in range(min(self._batch_size, len(self._pending)))]
        try:
            await asyncio.to_thread(self._store.record_verdicts, batch)
        except Exception:
            self.write_failures += 1
            log.exception("writing %d verdict records failed; will retry", len(batch))
            self._pending.extendleft(reversed(batch))
            while len(self._pending) > self._max_pending:
                self._pending.popleft()
                self.dropped += 1
            return False
        self.written += len(batch)
        return True

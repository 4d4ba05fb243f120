"""The verdict log, written behind the message path.

The SMTP handler calls :meth:`VerdictLog.add` after it has answered; that only appends to a
queue.  A background task writes the queue in batches with ``store.record_verdicts`` in a
worker thread, every ``log.verdict_batch_seconds`` or as soon as ``batch_size`` records wait,
so no reply ever waits on this database write.

A failed write (a locked database) keeps the batch and tries again next round; only past
``max_pending`` records are the oldest dropped, and every drop is logged and counted, so a long
database outage costs log lines, never memory or mail.

With a ``journal_dir``, :meth:`add` first appends the record to the verdict journal
(daemon/verdict_journal.py), so a record still queued when the process is killed is written
at the next start instead of being lost.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import logging
import time
from pathlib import Path
from typing import Any

from mailweir.daemon import verdict_journal
from mailweir.daemon.verdict_journal import VerdictJournal

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
        journal_dir: Path | None = None,
    ) -> None:
        """``retention_days``: token hashes older than this are erased from the log (the
        verdict rows stay, for the rates); checked at start and every ``expire_every`` s.
        ``journal_dir``: where the verdict journal lives; None: no journal."""
        self._store = store
        self._batch_seconds = batch_seconds
        self._batch_size = batch_size
        # (journal segment, record), in the order added; the segments never decrease.
        self._pending: collections.deque[tuple[int, Any]] = collections.deque()
        self._writing: list[int] = []  # the first segment of each batch being written
        # One batch at a time, in queue order; flush() waits on it for a batch in flight.
        self._write_lock = asyncio.Lock()
        self._journal_dir = journal_dir
        self._journal: VerdictJournal | None = None
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
        self.journal_failures = 0
        self.replayed = 0  # rows written at start from the previous run's journal

    @property
    def pending(self) -> int:
        return len(self._pending)

    def add(self, record: Any) -> None:
        """Journal and queue one record; never waits on the database and never raises."""
        segment = self._append_to_journal(record)
        if len(self._pending) >= self._max_pending:
            self._pending.popleft()
            self.dropped += 1
            if self.dropped == 1 or self.dropped % 1000 == 0:
                log.error("verdict log backlog full: %d records dropped so far", self.dropped)
        self._pending.append((segment, record))
        if len(self._pending) >= self._batch_size:
            self._wake.set()

    async def start(self) -> None:
        if self._journal_dir is not None and self._journal is None:
            await self._open_journal(self._journal_dir)
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
        unwritten = 0
        while self._pending:
            if not await self._write_batch():
                unwritten = len(self._pending)
                kept = " (kept in the journal for the next start)" if self._journal else ""
                log.error("verdict log closed with %d records unwritten%s", unwritten, kept)
                self.dropped += unwritten
                self._pending.clear()
        if self._journal is not None:
            if not unwritten:
                self._release_journal()  # everything is written: every segment goes
            self._journal.close()
            self._journal = None

    async def flush(self) -> None:
        """Write what is queued now, and wait for a batch the background task is writing
        (tests, and before a planned pause).  Stops at the first failed write."""
        while True:
            async with self._write_lock:  # a batch in flight lands (or comes back) first
                pass
            if not self._pending or not await self._write_batch():
                return

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
        async with self._write_lock:
            return await self._write_next_batch()

    async def _write_next_batch(self) -> bool:
        batch = [self._pending.popleft() for _ in range(min(self._batch_size, len(self._pending)))]
        first = batch[0][0] if batch else 0
        self._writing.append(first)
        try:
            await asyncio.to_thread(self._store.record_verdicts, [r for _, r in batch])
        except Exception:
            self.write_failures += 1
            log.exception("writing %d verdict records failed; will retry", len(batch))
            self._pending.extendleft(reversed(batch))
            while len(self._pending) > self._max_pending:
                self._pending.popleft()
                self.dropped += 1
            return False
        finally:
            self._writing.remove(first)
        self.written += len(batch)
        self._release_journal()
        return True

    # -- the journal ------------------------------------------------------------------------

    async def _open_journal(self, folder: Path) -> None:
        """Open the journal and write what the previous run left in it.  Mail comes first: a
        journal that cannot be used is logged and the daemon runs without one."""
        journal = VerdictJournal(folder)
        try:
            journal.open()
        except OSError as exc:
            log.error("verdict journal in %s unusable (%s); running without it", folder, exc)
            return
        self._journal = journal
        if not journal.leftovers:
            return
        try:
            found, written, unreadable = await asyncio.to_thread(
                verdict_journal.replay, self._store, journal.leftovers
            )
        except Exception:
            log.exception("replaying the verdict journal failed; kept for the next start")
            return
        journal.drop_leftovers()
        self.replayed += written
        log.info(
            "verdict journal: %d records left by the last run, %d of them written now (the "
            "rest were in the log already), %d unreadable lines skipped",
            found,
            written,
            unreadable,
        )

    def _append_to_journal(self, record: Any) -> int:
        if self._journal is None:
            return 0
        try:
            return self._journal.append(verdict_journal.encode(record))
        except Exception as exc:
            self.journal_failures += 1
            if self.journal_failures == 1 or self.journal_failures % 1000 == 0:
                log.error(
                    "verdict journal write failed (%d so far): %s", self.journal_failures, exc
                )
            return self._journal.current

    def _release_journal(self) -> None:
        """Delete the journal segments whose records all left the queue."""
        if self._journal is None:
            return
        heads = self._writing + ([self._pending[0][0]] if self._pending else [])
        oldest = min(heads, default=None)
        try:
            self._journal.release(oldest)
        except OSError as exc:
            log.error("deleting written verdict journal segments failed: %s", exc)

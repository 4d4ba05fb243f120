"""The verdict log: batching behind the message path, flushing on close, never blocking."""

from __future__ import annotations

import asyncio
import threading
import time
from typing import Any

import pytest
from smtp_helpers import wait_until

from mailweir.daemon.verdict_log import VerdictLog


class RecordingStore:
    """Stands in for ModelStore.record_verdicts; can be held shut or made to fail."""

    def __init__(self) -> None:
        self.batches: list[list[Any]] = []
        self.threads: set[int] = set()
        self.gate = threading.Event()
        self.gate.set()
        self.entered = threading.Event()
        self.fail_next = 0
        self.expiries: list[float] = []

    def expire_verdict_tokens(self, older_than: float) -> int:
        self.expiries.append(older_than)
        return 3

    def record_verdicts(self, records: list[Any]) -> None:
        self.threads.add(threading.get_ident())
        self.entered.set()
        assert self.gate.wait(10), "test left the store gate shut"
        if self.fail_next:
            self.fail_next -= 1
            raise RuntimeError("database is locked")
        self.batches.append(list(records))

    @property
    def records(self) -> list[Any]:
        return [r for batch in self.batches for r in batch]


async def test_verdict_log_writes_full_batches_without_waiting_for_timer() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=3600, batch_size=10)
    await log.start()
    for i in range(25):
        log.add(i)
    await wait_until(lambda: len(store.records) >= 20)
    assert [len(b) for b in store.batches[:2]] == [10, 10]
    assert store.threads and threading.get_ident() not in store.threads
    await log.close()
    assert store.records == list(range(25))


async def test_verdict_log_timer_writes_partial_batch() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=0.01, batch_size=1000)
    await log.start()
    log.add("a")
    log.add("b")
    await wait_until(lambda: store.records == ["a", "b"])
    assert log.written == 2
    await log.close()


async def test_verdict_log_close_flushes_everything() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=3600, batch_size=1000)
    await log.start()
    for i in range(1234):
        log.add(i)
    await log.close()
    assert store.records == list(range(1234))
    assert log.pending == 0


async def test_verdict_log_close_without_start_flushes() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=3600)
    log.add("x")
    await log.close()
    assert store.records == ["x"]


async def test_verdict_log_add_never_blocks_while_store_is_stuck() -> None:
    store = RecordingStore()
    store.gate.clear()
    log = VerdictLog(store, batch_seconds=3600, batch_size=5)
    await log.start()
    for i in range(5):
        log.add(i)
    await asyncio.to_thread(store.entered.wait, 10)  # a write is now stuck in the database
    for i in range(5, 500):
        log.add(i)  # returns at once although the writer is held up
    assert log.pending == 495
    store.gate.set()
    await log.close()
    assert store.records == list(range(500))


async def test_verdict_log_flush_waits_for_the_batch_being_written() -> None:
    # flush() promises that what was queued is written when it returns, also when the
    # background task has already taken it into a write that is still running.
    store = RecordingStore()
    store.gate.clear()
    log = VerdictLog(store, batch_seconds=3600, batch_size=3)
    await log.start()
    for i in range(3):
        log.add(i)  # a full batch: the background task starts writing it
    await asyncio.to_thread(store.entered.wait, 10)
    assert log.pending == 0  # taken off the queue, not yet in the database
    log.add(3)
    flushing = asyncio.create_task(log.flush())
    await asyncio.sleep(0.05)
    assert not flushing.done()
    store.gate.set()
    await asyncio.wait_for(flushing, 10)
    assert store.records == [0, 1, 2, 3]
    await log.close()


async def test_verdict_log_failed_write_is_retried_in_order() -> None:
    store = RecordingStore()
    store.fail_next = 1
    log = VerdictLog(store, batch_seconds=0.01, batch_size=3)
    await log.start()
    for i in range(7):
        log.add(i)
    await wait_until(lambda: len(store.records) == 7)
    assert store.records == list(range(7))
    assert log.write_failures == 1
    await log.close()


async def test_verdict_log_backlog_drops_oldest_and_counts(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=3600, batch_size=1000, max_pending=10)
    for i in range(15):
        log.add(i)
    assert log.dropped == 5
    assert "dropped" in caplog.text
    await log.close()
    assert store.records == list(range(5, 15))


async def test_verdict_log_close_reports_unwritable_records(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = RecordingStore()
    store.fail_next = 99
    log = VerdictLog(store, batch_seconds=3600)
    log.add("x")
    await log.close()
    assert log.dropped == 1
    assert "1 records unwritten" in caplog.text


async def test_verdict_log_erases_token_hashes_past_retention() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=0.01, retention_days=30, expire_every=3600)
    await log.start()
    await wait_until(lambda: bool(store.expiries))
    await log.close()
    month = 30 * 86400
    assert len(store.expiries) == 1  # once at start, then not again within the hour
    assert time.time() - month - 60 < store.expiries[0] <= time.time() - month


async def test_verdict_log_without_retention_never_erases() -> None:
    store = RecordingStore()
    log = VerdictLog(store, batch_seconds=0.01)
    await log.start()
    log.add("a")
    await wait_until(lambda: store.records == ["a"])
    await log.close()
    assert store.expiries == []

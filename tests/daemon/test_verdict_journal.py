"""The verdict journal: lines on disk before the reply, segments deleted once written, and a
replay at start that writes only what the database lacks.

A killed process is simulated by abandoning a VerdictLog without closing it (its task
cancelled, its file descriptors closed, nothing flushed): what is on disk then is what a
SIGKILL would leave.  tests/reliability/test_crash.py does it with a real SIGKILL.
"""

from __future__ import annotations

import asyncio
import contextlib
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from mailweir.daemon.verdict_journal import VerdictJournal, decode, encode, read_segments
from mailweir.daemon.verdict_log import VerdictLog
from mailweir.store.verdicts import VerdictRecord


def record(n: int, hashes: bool = True) -> VerdictRecord:
    return VerdictRecord(
        tracking_id=f"t{n:04d}",
        received_at=1_790_000_000.25 + n,
        recipients=1 + n % 3,
        size=2_000 + n,
        score=None if n % 5 == 0 else n / 1000,
        band="unjudged" if n % 5 == 0 else "ham",
        action="tag",
        token_hashes=np.array([n, -(2**63), 2**63 - 1], dtype=np.int64) if hashes else None,
    )


def same(a: VerdictRecord, b: VerdictRecord) -> bool:
    plain = [f for f in vars(a) if f != "token_hashes"]
    if any(getattr(a, f) != getattr(b, f) for f in plain):
        return False
    if a.token_hashes is None or b.token_hashes is None:
        return a.token_hashes is None and b.token_hashes is None
    return bool(np.array_equal(a.token_hashes, b.token_hashes))


class KeyedStore:
    """The two store calls the verdict log uses, with the table's primary key on tracking_id."""

    def __init__(self) -> None:
        self.rows: dict[str, VerdictRecord] = {}
        self.fail = False

    def record_verdicts(self, records: list[VerdictRecord]) -> None:
        if self.fail:
            raise RuntimeError("database is locked")
        keys = [r.tracking_id for r in records]
        if len(set(keys)) != len(keys) or set(keys) & self.rows.keys():
            raise RuntimeError("UNIQUE constraint failed: weir_verdict.tracking_id")
        self.rows.update(zip(keys, records, strict=True))

    def find_verdict(self, tracking_id: str) -> VerdictRecord | None:
        return self.rows.get(tracking_id)


async def journaled_log(store: Any, folder: Path, count: int) -> VerdictLog:
    """A started verdict log that writes only when flushed or closed, its journal in
    ``folder``, with ``record(0)`` to ``record(count - 1)`` added."""
    log = VerdictLog(store, batch_seconds=3600, batch_size=1000, journal_dir=folder)
    await log.start()
    for n in range(count):
        log.add(record(n))
    return log


def segments(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.glob("segment-*.journal"))


async def abandon(log: VerdictLog) -> None:
    """What SIGKILL leaves: no flush, no close; the kernel closes the files."""
    task, log._task = log._task, None
    if task is not None:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    if log._journal is not None:
        log._journal.close()


# -- the line format ---------------------------------------------------------------------------


@pytest.mark.parametrize("n", [0, 1, 7])
def test_journal_line_round_trips(n: int) -> None:
    for original in (record(n), record(n, hashes=False)):
        line = encode(original)
        assert line.endswith(b"\n") and line.count(b"\n") == 1
        decoded = decode(line)
        assert decoded is not None and same(decoded, original)


def test_journal_torn_line_is_skipped(tmp_path: Path) -> None:
    whole = encode(record(1)) + encode(record(2))
    path = tmp_path / "segment-000000000000.journal"
    path.write_bytes(whole + encode(record(3))[:25])  # a power cut in the middle of a line
    assert decode(encode(record(3))[:25]) is None
    records, unreadable = read_segments([path])
    assert [r.tracking_id for r in records] == ["t0001", "t0002"] and unreadable == 1


# -- segments ----------------------------------------------------------------------------------


def test_journal_rolls_segments_and_releases_the_written(tmp_path: Path) -> None:
    line = encode(record(1))
    journal = VerdictJournal(tmp_path, segment_bytes=3 * len(line))
    journal.open()
    numbers = [journal.append(line) for _ in range(7)]
    assert numbers == [0, 0, 0, 1, 1, 1, 2]
    assert len(segments(tmp_path)) == 3
    journal.release(2)  # the oldest queued record is in segment 2
    assert segments(tmp_path) == ["segment-000000000002.journal"]
    journal.release(None)  # nothing queued: the current segment goes too
    assert segments(tmp_path) == []
    assert journal.append(line) == 3
    journal.close()


def test_journal_open_lists_leftovers_and_numbers_on(tmp_path: Path) -> None:
    first = VerdictJournal(tmp_path)
    first.open()
    first.append(encode(record(1)))
    first.close()
    second = VerdictJournal(tmp_path)
    second.open()
    assert [p.name for p in second.leftovers] == ["segment-000000000000.journal"]
    assert second.append(encode(record(2))) == 1
    second.close()


def test_journal_one_owner_at_a_time(tmp_path: Path) -> None:
    owner = VerdictJournal(tmp_path)
    owner.open()
    with pytest.raises(OSError):
        VerdictJournal(tmp_path).open()
    owner.close()
    VerdictJournal(tmp_path).open()  # free again (the lock is released with the descriptor)


# -- the verdict log with its journal ----------------------------------------------------------


async def test_verdict_log_kill_then_restart_writes_every_queued_row(tmp_path: Path) -> None:
    store = KeyedStore()
    log = await journaled_log(store, tmp_path, 12)
    assert store.rows == {} and log.pending == 12  # nothing reached the database yet
    await abandon(log)

    restarted = VerdictLog(store, batch_seconds=3600, journal_dir=tmp_path)
    await restarted.start()
    assert sorted(store.rows) == [f"t{n:04d}" for n in range(12)]
    assert all(same(store.rows[f"t{n:04d}"], record(n)) for n in range(12))
    assert restarted.replayed == 12
    assert segments(tmp_path) == []  # replayed segments are deleted
    await restarted.close()


async def test_verdict_log_replay_skips_rows_already_written(tmp_path: Path) -> None:
    # Killed after the database took a batch but before the segment was deleted: no row twice.
    store = KeyedStore()
    log = await journaled_log(store, tmp_path, 6)
    store.record_verdicts([record(n) for n in range(4)])  # as if that batch had just landed
    await abandon(log)
    restarted = VerdictLog(store, batch_seconds=3600, journal_dir=tmp_path)
    await restarted.start()
    assert sorted(store.rows) == [f"t{n:04d}" for n in range(6)]
    assert restarted.replayed == 2
    await restarted.close()


async def test_verdict_log_deletes_segments_once_written(tmp_path: Path) -> None:
    store = KeyedStore()
    log = await journaled_log(store, tmp_path, 5)
    assert len(segments(tmp_path)) == 1
    await log.flush()
    assert len(store.rows) == 5 and segments(tmp_path) == []
    await log.close()


async def test_verdict_log_close_with_database_down_keeps_the_journal(tmp_path: Path) -> None:
    store = KeyedStore()
    store.fail = True
    log = await journaled_log(store, tmp_path, 3)
    await log.close()  # one last try fails: the rows stay in the journal
    assert log.dropped == 3 and len(segments(tmp_path)) == 1
    store.fail = False
    restarted = VerdictLog(store, batch_seconds=3600, journal_dir=tmp_path)
    await restarted.start()
    assert sorted(store.rows) == ["t0000", "t0001", "t0002"]
    await restarted.close()


async def test_verdict_log_replay_failure_keeps_segments_and_starts(tmp_path: Path) -> None:
    store = KeyedStore()
    log = VerdictLog(store, batch_seconds=3600, batch_size=1000, journal_dir=tmp_path)
    await log.start()
    log.add(record(1))
    await abandon(log)
    store.fail = True
    restarted = VerdictLog(store, batch_seconds=3600, batch_size=1000, journal_dir=tmp_path)
    await restarted.start()  # the database is down: start anyway, keep the segment
    restarted.add(record(2))
    assert restarted.pending == 1 and len(segments(tmp_path)) == 2
    await abandon(restarted)
    store.fail = False
    third = VerdictLog(store, batch_seconds=3600, journal_dir=tmp_path)
    await third.start()
    assert sorted(store.rows) == ["t0001", "t0002"]
    await third.close()


async def test_verdict_log_unusable_journal_folder_runs_without(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the journal folder should be")
    store: Any = KeyedStore()
    log = VerdictLog(store, batch_seconds=3600, journal_dir=blocker)
    await log.start()
    log.add(record(1))
    await log.close()
    assert "t0001" in store.rows
    assert "running without it" in caplog.text

"""Upkeep the daemon runs on a schedule: trimming the verdict log and tidying the database.

Pruning rare tokens is :meth:`ModelStore.prune`; the rest is here.  Verdict rows go in small
batches, each its own transaction, so the verdict log and training never wait long for the
write lock.  The last run of each task is stamped in ``weir_meta``, so a restarted daemon (or
another daemon on the same PostgreSQL) keeps the schedule.

Several daemons on one database share one schedule: before a run, a process takes the task's
lease (:func:`claim`), a compare-and-set on the ``weir_meta`` row ``upkeep.<task>.running``.
Only one process holds it at a time, and a task another process finished within its interval
is not run again.  A lease outlives a crashed holder by at most its length, after which anyone
may take it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import Connection, delete, select
from sqlalchemy.dialects import postgresql, sqlite

from mailweir.store import schema
from mailweir.store.engine import NO_BEGIN
from mailweir.store.errors import store_errors

if TYPE_CHECKING:
    from mailweir.store.counts import ModelStore

TASKS = ("prune", "trim", "tidy")  # daemon/upkeep.py runs them; each stamps its last run
TRIM_BATCH = 5000  # verdict rows per delete transaction
STAMP_PREFIX = "upkeep."  # weir_meta key of a task's last run: "upkeep.<task>"
LEASE_SUFFIX = ".running"  # weir_meta key "upkeep.<task>.running": the holder's lease end
FREE = "0"  # a lease's value when nobody holds it


@dataclass(frozen=True)
class Claim:
    """The answer of :func:`claim`.  ``taken``: this process runs the task now and must
    :func:`release` it after; otherwise ``due`` is when to ask again, and ``reason`` says why
    not now ("finished elsewhere", "running elsewhere")."""

    taken: bool
    due: float
    reason: str = ""


@dataclass(frozen=True)
class TidyResult:
    """What database tidying did.  ``wal_bytes``: size of the WAL file the checkpoint emptied;
    ``busy``: another connection kept the checkpoint from finishing (the next run tries again)."""

    backend: str
    done: bool
    wal_bytes: int = 0
    busy: bool = False
    note: str = ""


def trim_verdicts(store: ModelStore, older_than: float, batch: int = TRIM_BATCH) -> int:
    """Delete verdict rows received before ``older_than`` (unix time); return how many."""
    v = schema.verdict
    removed = 0
    while True:
        oldest = select(v.c.tracking_id).where(v.c.received_at < older_than).limit(batch)
        with store.transaction(counts=False) as conn:
            gone = conn.execute(delete(v).where(v.c.tracking_id.in_(oldest))).rowcount
        removed += int(gone)
        if gone < batch:
            return removed


def tidy(store: ModelStore) -> TidyResult:
    """SQLite: checkpoint the WAL into the main file and truncate it, then ``PRAGMA optimize``
    (refreshes the planner's statistics where they went stale).  PostgreSQL: nothing; its
    autovacuum does this work."""
    engine = store.engine
    if engine.dialect.name != "sqlite":
        return TidyResult(engine.dialect.name, False, note="left to PostgreSQL's autovacuum")
    # TRUNCATE reports zeros once done, so the WAL's size is read from the file beforehand.
    wal = Path(f"{engine.url.database}-wal")
    wal_bytes = wal.stat().st_size if wal.exists() else 0
    # Both pragmas refuse to run inside a transaction: autocommit connection (engine.py).
    with store_errors(), engine.connect().execution_options(**{NO_BEGIN: True}) as conn:
        busy = conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)").one()[0]
        conn.exec_driver_sql("PRAGMA optimize")
    return TidyResult("sqlite", True, wal_bytes, bool(busy))


def claim(store: ModelStore, task: str, now: float, *, every: float | None, lease: float) -> Claim:
    """Take ``task``'s lease until ``now + lease`` unless another process holds it, or (with
    ``every``) finished the task less than ``every`` seconds ago.

    One transaction: the stamp and the lease are read, and the lease is written only if it
    still holds the value read (a compare-and-set, so of two processes that read the same
    free lease, one takes it).  ``every`` None (a run by hand) ignores the stamp.
    """
    stamp_key, lease_key = STAMP_PREFIX + task, STAMP_PREFIX + task + LEASE_SUFFIX
    m = schema.meta
    with store.transaction(counts=False) as conn:
        rows = dict(
            conn.execute(
                select(m.c.key, m.c.value).where(m.c.key.in_([stamp_key, lease_key]))
            ).all()
        )
        last, held = _seconds(rows.get(stamp_key)), _seconds(rows.get(lease_key))
        if every is not None and last is not None and now < last + every:
            return Claim(False, last + every, "finished elsewhere")
        if held is not None and now < held:
            return Claim(False, held, "running elsewhere")
        if not _compare_and_set(conn, lease_key, rows.get(lease_key), f"{now + lease:.3f}"):
            return Claim(False, now + lease, "running elsewhere")
    return Claim(True, now)


def release(store: ModelStore, task: str) -> None:
    """Give up ``task``'s lease (after its run, whether or not it succeeded)."""
    store.set_meta(STAMP_PREFIX + task + LEASE_SUFFIX, FREE)


def _compare_and_set(conn: Connection, key: str, expected: str | None, value: str) -> bool:
    """Write ``value`` under ``key`` if the row still holds ``expected`` (None: no row)."""
    m = schema.meta
    insert = postgresql.insert if conn.dialect.name == "postgresql" else sqlite.insert
    stmt = insert(m).values(key=key, value=value)
    if expected is None:
        stmt = stmt.on_conflict_do_nothing(index_elements=[m.c.key])
    else:
        stmt = stmt.on_conflict_do_update(
            index_elements=[m.c.key], set_={"value": value}, where=m.c.value == expected
        )
    # RETURNING names the row only when it was written (psycopg reports no rowcount here).
    return conn.execute(stmt.returning(m.c.key)).first() is not None


def _seconds(value: str | None) -> float | None:
    try:
        return None if value is None else float(value)
    except ValueError:
        return None  # hand-edited: as if absent


def stamp(store: ModelStore, task: str, at: float) -> None:
    store.set_meta(STAMP_PREFIX + task, f"{at:.3f}")


def last_run(store: ModelStore, task: str) -> float | None:
    return _seconds(store.get_meta(STAMP_PREFIX + task))  # hand-edited: as if never run

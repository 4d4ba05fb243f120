"""Upkeep the daemon runs on a schedule: trimming the verdict log and tidying the database.

Pruning rare tokens is :meth:`ModelStore.prune`; the rest is here.  Verdict rows go in small
batches, each its own transaction, so the verdict log and training never wait long for the
write lock.  The last run of each task is stamped in ``weir_meta``, so a restarted daemon (or
another daemon on the same PostgreSQL) keeps the schedule.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import delete, select

from mailweir.store import schema
from mailweir.store.engine import NO_BEGIN
from mailweir.store.errors import store_errors

if TYPE_CHECKING:
    from mailweir.store.counts import ModelStore

TASKS = ("prune", "trim", "tidy")  # daemon/upkeep.py runs them; each stamps its last run
TRIM_BATCH = 5000  # verdict rows per delete transaction
STAMP_PREFIX = "upkeep."  # weir_meta key of a task's last run: "upkeep.<task>"


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


def stamp(store: ModelStore, task: str, at: float) -> None:
    store.set_meta(STAMP_PREFIX + task, f"{at:.3f}")


def last_run(store: ModelStore, task: str) -> float | None:
    value = store.get_meta(STAMP_PREFIX + task)
    try:
        return None if value is None else float(value)
    except ValueError:
        return None  # a hand-edited stamp: run as if never run

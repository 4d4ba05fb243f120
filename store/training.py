"""Training arithmetic in SQL: ledger resolution, count upserts, class totals.

Every count change is an increment computed by the database (``ham = ham + :delta``), never
a value read and written back from Python, so concurrent trainers on PostgreSQL lose no
count.  The ledger row and the counts change in the same transaction, and the ledger's
primary key decides when two processes train the same message at once.  Rows are touched
in sorted key order (ledger, then tokens, then class totals) so concurrent transactions
queue behind each other instead of deadlocking.
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy import (
    Connection,
    bindparam,
    delete,
    func,
    literal_column,
    select,
    text,
    update,
)
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.sql.expression import ColumnElement

from mailweir.model.types import TokenCounts, TokenHashes
from mailweir.store import schema
from mailweir.store.engine import sqlite_variable_limit
from mailweir.store.errors import StoreBusy

TrainItem = tuple[TokenHashes, int, bytes, str]  # hashes, label, digest, source
_LEDGER_ROUNDS = 10


class TrainResult(enum.Enum):
    TRAINED = "trained"  # new message, counted
    ALREADY_KNOWN = "already_known"  # same digest already trained with this label
    MOVED = "moved"  # trained before with the other label; counts moved over
    UNTRAINED = "untrained"  # removed from the counts and the ledger
    NOT_KNOWN = "not_known"  # untrain of a message that was never trained


@dataclass
class Plan:
    """What one batch does to the counts once the ledger has decided."""

    results: list[TrainResult]
    hashes: TokenHashes = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    delta: TokenCounts = field(default_factory=lambda: np.zeros((0, 2), dtype=np.int64))
    messages: npt.NDArray[np.int64] = field(default_factory=lambda: np.zeros(2, np.int64))


def chunk_size(conn: Connection) -> int:
    return sqlite_variable_limit() // 2 if conn.dialect.name == "sqlite" else 20000


def _chunks(values: list, size: int) -> list[list]:
    return [values[i : i + size] for i in range(0, len(values), size)]


# -- ledger ----------------------------------------------------------------------------------


_LOCK_LEDGER = (
    select(schema.ledger.c.digest, schema.ledger.c.label)
    .where(schema.ledger.c.digest.in_(bindparam("digests", expanding=True)))
    .order_by(schema.ledger.c.digest)
    .with_for_update()  # ignored on SQLite, where BEGIN IMMEDIATE already serialises writers
)


def _lock_ledger(conn: Connection, digests: list[bytes]) -> dict[bytes, int]:
    """Labels of the digests already in the ledger, row-locked until commit (PostgreSQL)."""
    known: dict[bytes, int] = {}
    for part in _chunks(sorted(digests), chunk_size(conn)):
        rows = conn.execute(_LOCK_LEDGER, {"digests": part}).fetchall()
        known.update((bytes(d), int(label)) for d, label in rows)
    return known


def _insert_new(conn: Connection, rows: list[dict[str, Any]]) -> set[bytes]:
    """Insert ledger rows unless present; return the digests this transaction inserted."""
    if not rows:
        return set()
    rows = sorted(rows, key=lambda r: r["digest"])
    if conn.dialect.name == "sqlite":
        # BEGIN IMMEDIATE holds the write lock since the ledger was read, so nothing can
        # conflict; a plain driver executemany skips SQLAlchemy's per-row RETURNING batches.
        names = ("digest", "label", "trained_at", "source")
        sql = f"INSERT INTO weir_ledger ({', '.join(names)}) VALUES (?, ?, ?, ?)"
        conn.exec_driver_sql(sql, [tuple(r[n] for n in names) for r in rows])
        return {r["digest"] for r in rows}
    stmt = postgresql.insert(schema.ledger).on_conflict_do_nothing(index_elements=["digest"])
    got: set[bytes] = set()
    for part in _chunks(rows, 2000):
        result = conn.execute(stmt.returning(schema.ledger.c.digest), part)
        got.update(bytes(row[0]) for row in result)
    return got


def _simulate(
    items: Sequence[TrainItem], known: dict[bytes, int]
) -> tuple[list[TrainResult], npt.NDArray[np.int64], dict[bytes, tuple[int, str]]]:
    """Replay the batch one message at a time: results, per-item deltas, final labels."""
    state = dict(known)
    results: list[TrainResult] = []
    deltas = np.zeros((len(items), 2), dtype=np.int64)
    final: dict[bytes, tuple[int, str]] = {}
    for i, (_, label, digest, source) in enumerate(items):
        before = state.get(digest)
        if before is None:
            results.append(TrainResult.TRAINED)
            deltas[i, label] = 1
        elif before == label:
            results.append(TrainResult.ALREADY_KNOWN)
            continue
        else:
            results.append(TrainResult.MOVED)
            deltas[i, before] = -1
            deltas[i, label] = 1
        state[digest] = label
        final[digest] = (label, source)
    return results, deltas, final


def resolve_training(conn: Connection, items: Sequence[TrainItem], now: float) -> Plan:
    """Write the ledger for *items* and return the count changes they imply."""
    for _, label, digest, _ in items:
        if label not in (0, 1):
            raise ValueError(f"label must be 0 (ham) or 1 (spam), got {label!r}")
        if not isinstance(digest, bytes) or not digest:
            raise ValueError("digest must be non-empty bytes")
    digests: set[bytes] = {item[2] for item in items}
    known = _lock_ledger(conn, list(digests))
    inserted: set[bytes] = set()
    for _ in range(_LEDGER_ROUNDS):
        results, deltas, final = _simulate(items, known)
        rows: list[dict[str, Any]] = [
            {"digest": d, "label": label, "trained_at": now, "source": source}
            for d, (label, source) in final.items()
            if d not in known and d not in inserted
        ]
        got = _insert_new(conn, rows)
        inserted |= got
        lost = [r["digest"] for r in rows if r["digest"] not in got]
        if not lost:
            break
        # Another process trained these between our read and our insert: read and retry.
        known.update(_lock_ledger(conn, lost))
    else:
        raise StoreBusy("ledger kept changing under concurrent training; try again")
    moved: list[dict[str, Any]] = [
        {"d": d, "label": label, "source": source}
        for d, (label, source) in final.items()
        if d in known and known[d] != label
    ]
    if moved:
        led = schema.ledger
        stmt = (
            update(led)
            .where(led.c.digest == bindparam("d"))
            .values(label=bindparam("label"), source=bindparam("source"), trained_at=now)
        )
        conn.execute(stmt, sorted(moved, key=lambda r: r["d"]))
    return _plan(items, results, deltas)


def _increasing_by_owner(every: TokenHashes, owner: npt.NDArray[np.intp]) -> bool:
    """Whether each owner's hashes are strictly increasing (so none repeats within one)."""
    rises = every[1:] > every[:-1]
    rises |= owner[1:] != owner[:-1]
    return bool(rises.all())


def resolve_untraining(conn: Connection, hashes: TokenHashes, digest: bytes) -> Plan:
    """Remove *digest* from the ledger; return the count changes (none if it was unknown)."""
    led = schema.ledger
    row = conn.execute(delete(led).where(led.c.digest == digest).returning(led.c.label)).first()
    if row is None:
        return Plan([TrainResult.NOT_KNOWN])
    deltas = np.zeros((1, 2), dtype=np.int64)
    deltas[0, int(row[0])] = -1
    return _plan([(hashes, int(row[0]), digest, "")], [TrainResult.UNTRAINED], deltas)


def _plan(
    items: Sequence[TrainItem], results: list[TrainResult], deltas: npt.NDArray[np.int64]
) -> Plan:
    active = np.flatnonzero(deltas.any(axis=1))
    if not active.size:
        return Plan(results)
    parts = [np.asarray(items[int(i)][0], dtype=np.int64).ravel() for i in active]
    owner = np.repeat(np.arange(len(active)), [len(p) for p in parts])
    every = np.concatenate(parts)
    if len(every) > 1 and not _increasing_by_owner(every, owner):
        # A hash repeated within one message counts once (presence): drop repeated (owner,
        # hash).  Tokenized messages come sorted and unique, and skip this.
        order = np.lexsort((every, owner))
        every, owner = every[order], owner[order]
        keep = np.ones(len(every), dtype=np.bool_)
        keep[1:] = (every[1:] != every[:-1]) | (owner[1:] != owner[:-1])
        every, owner = every[keep], owner[keep]
    # Each distinct hash's summed change: one quicksort, then sums over runs of equal hashes
    # (np.unique with return_inverse and two float bincounts took twice as long).
    order = every.argsort()
    ordered = every[order]
    starts = np.ones(len(ordered), dtype=np.bool_)
    np.not_equal(ordered[1:], ordered[:-1], out=starts[1:])
    hashes = ordered[starts]
    changes = deltas[active][owner[order]]
    delta = (
        np.add.reduceat(changes, starts.nonzero()[0], axis=0)
        if len(ordered)
        else np.zeros((0, 2), dtype=np.int64)
    )
    changed = delta.any(axis=1)
    return Plan(results, hashes[changed], delta[changed], deltas.sum(axis=0))


# -- counts ----------------------------------------------------------------------------------


def _sqlite_upsert() -> tuple[str, tuple[str, ...]]:
    """The SQLite count upsert, compiled once: SQL text and positional parameter order."""
    if _UPSERT_SQL:
        return _UPSERT_SQL[0]
    t = schema.token
    stmt = sqlite.insert(t).values(
        hash=bindparam("h"), ham=bindparam("ih"), spam=bindparam("is"), last_seen=bindparam("day")
    )
    zero: ColumnElement[int] = literal_column("0")
    stmt = stmt.on_conflict_do_update(
        index_elements=[t.c.hash],
        set_={
            # SQLite's two-argument max() is the scalar maximum
            "ham": func.max(t.c.ham + bindparam("dh"), zero),
            "spam": func.max(t.c.spam + bindparam("ds"), zero),
            "last_seen": stmt.excluded.last_seen,
        },
    )
    compiled = stmt.compile(dialect=sqlite.dialect())
    _UPSERT_SQL.append((str(compiled), tuple(compiled.positiontup or ())))
    return _UPSERT_SQL[0]


_UPSERT_SQL: list[tuple[str, tuple[str, ...]]] = []

# PostgreSQL: set-based statements over array parameters instead of one row at a time.
# Growing tokens (training) go through one INSERT ... ON CONFLICT whose rows are taken in hash
# order, so concurrent trainers lock rows in the same order and queue instead of deadlocking.
# Shrinking tokens (untraining, moves) lock their existing rows in hash order, update exactly
# those, and insert only the growing part of any that are missing.
_PG_UNNEST = "unnest(%(h)s::bigint[], %(dh)s::integer[], %(ds)s::integer[]) AS u(h, dh, ds)"
_PG_UPSERT = (
    "INSERT INTO weir_token (hash, ham, spam, last_seen) "
    f"SELECT u.h, GREATEST(u.dh, 0), GREATEST(u.ds, 0), %(day)s FROM {_PG_UNNEST} "
    "WHERE u.dh > 0 OR u.ds > 0 ORDER BY u.h "
    "ON CONFLICT (hash) DO UPDATE SET ham = weir_token.ham + excluded.ham, "
    "spam = weir_token.spam + excluded.spam, last_seen = excluded.last_seen"
)
_PG_LOCK = "SELECT hash FROM weir_token WHERE hash = ANY(%(h)s::bigint[]) ORDER BY hash FOR UPDATE"
_PG_UPDATE = (
    "UPDATE weir_token AS t SET ham = GREATEST(t.ham + u.dh, 0), "
    "spam = GREATEST(t.spam + u.ds, 0), last_seen = %(day)s "
    f"FROM {_PG_UNNEST} WHERE t.hash = u.h"
)
_PG_CHUNK = 50_000


def apply_counts(conn: Connection, hashes: TokenHashes, delta: TokenCounts, day: int) -> None:
    """Add *delta* (shape (n, 2)) to the tokens' counts; delete rows that reach 0/0.

    Counts never go below zero, and a negative delta never creates or touches a row that is
    not there: untraining a token that ``prune`` already removed is a no-op.
    """
    if not len(hashes):
        return
    if conn.dialect.name == "postgresql":
        _apply_counts_pg(conn, hashes, delta, day)
    else:
        _apply_counts_sqlite(conn, hashes, delta, day)
    shrinking = hashes[(delta < 0).any(axis=1)].tolist()
    t = schema.token
    for part in _chunks(shrinking, chunk_size(conn)):
        conn.execute(delete(t).where(t.c.hash.in_(part), t.c.ham == 0, t.c.spam == 0))


def _apply_counts_sqlite(
    conn: Connection, hashes: TokenHashes, delta: TokenCounts, day: int
) -> None:
    # One driver executemany over plain tuples: SQLAlchemy's per-row parameter processing
    # would cost more than SQLite's own work for bulk imports.
    grows = (delta > 0).any(axis=1)
    inserted = np.maximum(delta, 0)
    values = {
        "h": hashes,
        "ih": inserted[:, 0],
        "is": inserted[:, 1],
        "day": np.full(len(hashes), day, dtype=np.int64),
        "dh": delta[:, 0],
        "ds": delta[:, 1],
    }
    sql, order = _sqlite_upsert()
    if grows.any():
        rows = list(zip(*(values[n][grows].tolist() for n in order), strict=True))
        conn.exec_driver_sql(sql, rows)
    if not grows.all():  # pure decrements update existing rows only
        shrink = ~grows
        conn.exec_driver_sql(
            "UPDATE weir_token SET ham = max(ham + ?, 0), spam = max(spam + ?, 0) WHERE hash = ?",
            list(
                zip(
                    delta[shrink, 0].tolist(),
                    delta[shrink, 1].tolist(),
                    hashes[shrink].tolist(),
                    strict=True,
                )
            ),
        )


def _apply_counts_pg(conn: Connection, hashes: TokenHashes, delta: TokenCounts, day: int) -> None:
    def arrays(mask: npt.NDArray[np.bool_]) -> dict[str, Any]:
        return {
            "h": hashes[mask].tolist(),
            "dh": delta[mask, 0].tolist(),
            "ds": delta[mask, 1].tolist(),
            "day": day,
        }

    shrinks = (delta < 0).any(axis=1)
    for start in range(0, len(hashes), _PG_CHUNK):
        window = np.zeros(len(hashes), dtype=np.bool_)
        window[start : start + _PG_CHUNK] = True
        if (window & ~shrinks).any():
            conn.exec_driver_sql(_PG_UPSERT, arrays(window & ~shrinks))
        if not (window & shrinks).any():
            continue
        rows = conn.exec_driver_sql(_PG_LOCK, {"h": hashes[window & shrinks].tolist()})
        locked = np.isin(hashes, np.array([r[0] for r in rows.fetchall()], dtype=np.int64))
        if (window & shrinks & locked).any():
            conn.exec_driver_sql(_PG_UPDATE, arrays(window & shrinks & locked))
        if (window & shrinks & ~locked).any():  # pruned tokens: only the growing part returns
            conn.exec_driver_sql(_PG_UPSERT, arrays(window & shrinks & ~locked))


_BUMP = text(
    "UPDATE weir_class_total SET messages = messages + :delta, revision = revision + 1 "
    "WHERE label = :label RETURNING revision"
)


def bump_totals(conn: Connection, messages: npt.NDArray[np.int64]) -> int:
    """Add to the class totals and advance both rows' revision (label order: no deadlock).

    Returns the database revision (sum over both rows) as of this transaction's commit:
    the rows stay locked until then, so no other writer can slip in between.
    """
    revision = 0
    for label in (0, 1):
        params = {"delta": int(messages[label]), "label": label}
        revision += conn.execute(_BUMP, params).scalar_one()
    return revision

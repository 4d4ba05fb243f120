"""Named, ordered schema migrations, each applied in its own transaction and recorded.

A migration's name is recorded in ``weir_schema`` in the same transaction as its changes,
so a crash leaves either both or neither.  Several processes may open one PostgreSQL
database at once: each migration transaction takes an advisory lock and re-checks the log.
On SQLite the write transaction (BEGIN IMMEDIATE) serialises them the same way.

Once released, a migration never changes: a later change to ``schema.py`` comes with a
new migration that alters the tables (and the initial migration then keeps its own copy of
the original table definitions).
"""

from __future__ import annotations

import time
from collections.abc import Callable

from sqlalchemy import (
    BigInteger,
    Column,
    Connection,
    Engine,
    Float,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    SmallInteger,
    String,
    Table,
    insert,
    inspect,
    select,
    text,
)

from mailweir.store import schema
from mailweir.store.errors import SchemaTooNew, StoreUnavailable

Migration = tuple[str, Callable[[Connection], None]]

# Arbitrary constant naming our advisory lock on PostgreSQL ("weir" in ASCII).
_PG_LOCK_KEY = 0x77656972


# weir_verdict as 0001 created it; schema.verdict has grown since (0002).
_VERDICT_0001 = Table(
    "weir_verdict",
    MetaData(),
    Column("tracking_id", String(64), primary_key=True),
    Column("received_at", Float, nullable=False),
    Column("recipients", Integer, nullable=False),
    Column("size", BigInteger, nullable=False),
    Column("score", Float, nullable=True),
    Column("band", String(16), nullable=False),
    Column("action", String(16), nullable=False),
    Column("token_hashes", LargeBinary, nullable=True),
    Index("weir_verdict_received_at", "received_at"),
)
# weir_ledger as 0001 created it; schema.ledger has an index since (0004).
_LEDGER_0001 = Table(
    "weir_ledger",
    MetaData(),
    Column("digest", LargeBinary(16), primary_key=True),
    Column("label", SmallInteger, nullable=False),
    Column("trained_at", Float, nullable=False),
    Column("source", String(64), nullable=False),
    sqlite_with_rowid=False,
)


def _initial(conn: Connection) -> None:
    tables = [
        schema.token,
        schema.class_total,
        schema.meta,
        schema.feedback,
    ]
    schema.metadata.create_all(conn, tables=tables)
    _LEDGER_0001.create(conn)
    _VERDICT_0001.create(conn)
    conn.execute(
        insert(schema.class_total),
        [{"label": label, "messages": 0, "revision": 0} for label in (0, 1)],
    )
    conn.execute(insert(schema.meta).values(key="created", value=f"{time.time():.0f}"))


def _verdict_sender_list(conn: Connection) -> None:
    """Which sender list decided a message (site policy); NULL for every older row."""
    conn.execute(text("ALTER TABLE weir_verdict ADD COLUMN sender_list VARCHAR(8)"))


def _verdict_window_index(conn: Connection) -> None:
    """Arrival time, band and tracking id in one index, which the rate gauges' counts of a
    window read alone: through the arrival-time index they read every verdict row of the
    window, each about a page with its token hashes, and a minute's refresh under load left
    tens of MB of the file mapped in a pooled connection.  It serves every query the
    arrival-time index served, so that one goes."""
    conn.execute(
        text("CREATE INDEX weir_verdict_window ON weir_verdict (received_at, band, tracking_id)")
    )
    conn.execute(text("DROP INDEX weir_verdict_received_at"))


def _ledger_trained_at_index(conn: Connection) -> None:
    """An index on the ledger's training time, so the model gauges' newest entry (every
    minute) is one index read, not a scan of every entry the model was ever trained on."""
    conn.execute(text("CREATE INDEX weir_ledger_trained_at ON weir_ledger (trained_at)"))


MIGRATIONS: tuple[Migration, ...] = (
    ("0001_initial", _initial),
    ("0002_verdict_sender_list", _verdict_sender_list),
    ("0003_verdict_window_index", _verdict_window_index),
    ("0004_ledger_trained_at_index", _ledger_trained_at_index),
)


def _lock(conn: Connection) -> None:
    if conn.dialect.name == "postgresql":
        conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _PG_LOCK_KEY})


def applied_migrations(conn: Connection) -> list[str]:
    """Names recorded in ``weir_schema``, in the order they were applied."""
    rows = conn.execute(
        select(schema.schema_log.c.name).order_by(
            schema.schema_log.c.applied_at, schema.schema_log.c.name
        )
    )
    return [row[0] for row in rows]


def migrate(engine: Engine, *, create: bool = True) -> list[str]:
    """Apply every pending migration; return the names applied now."""
    with engine.begin() as conn:
        _lock(conn)
        if not inspect(conn).has_table(schema.schema_log.name):
            if not create:
                raise StoreUnavailable("database has no mailweir schema (create=False)")
            schema.schema_log.create(conn)
        done = set(applied_migrations(conn))
    known = {name for name, _ in MIGRATIONS}
    unknown = sorted(done - known)
    if unknown:
        raise SchemaTooNew(unknown)
    applied = []
    for name, step in MIGRATIONS:
        if name in done:
            continue
        with engine.begin() as conn:
            _lock(conn)
            if name in applied_migrations(conn):  # another process got here first
                continue
            step(conn)
            conn.execute(insert(schema.schema_log).values(name=name, applied_at=time.time()))
        applied.append(name)
    return applied

"""Turn a database target (URL or file path) into a configured SQLAlchemy engine."""

from __future__ import annotations

import sqlite3
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import URL, make_url
from sqlalchemy.exc import ArgumentError

from mailweir.store.errors import StoreUnavailable

# Connection settings for SQLite files.  WAL lets the scoring path read while a trainer
# writes; synchronous=NORMAL is durable across application crashes in WAL mode (a power
# cut may lose the last transactions, never corrupt); the busy timeout makes concurrent
# writers wait instead of failing at once.
SQLITE_PRAGMAS: tuple[tuple[str, str], ...] = (
    ("journal_mode", "WAL"),
    ("synchronous", "NORMAL"),
    ("busy_timeout", "10000"),
    ("mmap_size", str(256 * 1024 * 1024)),
    ("cache_size", str(-64 * 1024)),  # negative: KiB, i.e. 64 MiB of page cache
    ("temp_store", "MEMORY"),
    ("foreign_keys", "ON"),
)

# Execution options for SQLite connections.  READ_ONLY begins a deferred transaction (a
# snapshot for several reads, no write lock); NO_BEGIN runs statements in autocommit mode,
# so a lookup is one statement rather than BEGIN / SELECT / ROLLBACK.
READ_ONLY = "weir_read_only"
NO_BEGIN = "weir_no_begin"


def sqlite_variable_limit() -> int:
    """Largest number of bound parameters one SQLite statement may carry (3.32+: 32766)."""
    return 32766 if sqlite3.sqlite_version_info >= (3, 32, 0) else 999


def target_url(target: str) -> URL:
    """A SQLAlchemy URL for *target*: a URL as given, or a filesystem path -> SQLite file."""
    if "://" in target:
        try:
            return make_url(target)
        except ArgumentError as exc:
            raise StoreUnavailable(f"not a database URL: {target!r}") from exc
    return URL.create("sqlite", database=str(Path(target).expanduser().resolve()))


def make_engine(target: str, *, create: bool = True) -> Engine:
    """Create the engine for *target*; SQLite files get pragmas and explicit transactions."""
    url = target_url(target)
    if url.get_backend_name() != "sqlite":
        return create_engine(url, pool_pre_ping=True)
    database = url.database or ""
    if database in ("", ":memory:") or database.startswith("file:"):
        raise StoreUnavailable("the store needs a SQLite file, not an in-memory database")
    path = Path(database)
    if not path.exists():
        if not create:
            raise StoreUnavailable(f"SQLite database {path} does not exist (create=False)")
        path.parent.mkdir(parents=True, exist_ok=True)
    engine = create_engine(url)
    _install_sqlite_hooks(engine)
    return engine


def _install_sqlite_hooks(engine: Engine) -> None:
    # The sqlite3 module's legacy transaction handling skips BEGIN before SELECT, DDL and
    # SAVEPOINT; SQLAlchemy's documented recipe hands transaction control to us instead.
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        for name, value in SQLITE_PRAGMAS:
            cursor.execute(f"PRAGMA {name}={value}")
        cursor.close()

    # Writers take the write lock up front (BEGIN IMMEDIATE): a deferred transaction that
    # reads first and writes later cannot wait out a busy lock and would fail instead.
    @event.listens_for(engine, "begin")
    def _on_begin(connection: Any) -> None:
        options = connection.get_execution_options()
        if not options.get(NO_BEGIN, False):
            begin = "BEGIN" if options.get(READ_ONLY, False) else "BEGIN IMMEDIATE"
            connection.connection.dbapi_connection.execute(begin)

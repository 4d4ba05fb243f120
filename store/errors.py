"""Errors raised by the store.

    StoreError               anything the database layer could not do
    ├── StoreBusy            a lock or timeout got in the way; retrying later may work
    ├── StoreUnavailable     the database cannot be reached or opened
    └── SchemaTooNew         the database was migrated by a newer mailweir

SQLAlchemy and driver errors are translated at the boundary by ``store_errors()``, which
re-raises ``from exc`` so the original stays attached to the traceback.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import exc as sa_exc


class StoreError(Exception):
    """The store could not complete an operation."""


class StoreBusy(StoreError):
    """The database was locked or a statement timed out (SQLite busy, PostgreSQL lock wait)."""


class StoreUnavailable(StoreError):
    """The database could not be opened or the connection was lost."""


class SchemaTooNew(StoreError):
    """The database has migrations this version of mailweir does not know."""

    def __init__(self, unknown: list[str]) -> None:
        super().__init__(
            f"database schema has migrations unknown to this mailweir version: {unknown}; "
            "upgrade mailweir or point it at another database"
        )
        self.unknown = unknown


# PostgreSQL SQLSTATE codes that mean "try again later".
_BUSY_SQLSTATES = frozenset(
    {
        "40001",  # serialization_failure
        "40P01",  # deadlock_detected
        "55P03",  # lock_not_available (lock_timeout)
        "57014",  # query_canceled (statement_timeout)
    }
)
_SQLITE_BUSY_TEXT = ("database is locked", "database table is locked", "database is busy")


def _classify(exc: Exception) -> type[StoreError]:
    orig = getattr(exc, "orig", None)
    sqlstate = getattr(orig, "sqlstate", None) or ""
    text = str(orig if orig is not None else exc).lower()
    if sqlstate in _BUSY_SQLSTATES or any(t in text for t in _SQLITE_BUSY_TEXT):
        return StoreBusy
    if sqlstate.startswith("08") or "unable to open database" in text:
        return StoreUnavailable
    if isinstance(exc, sa_exc.DBAPIError) and exc.connection_invalidated:
        return StoreUnavailable
    if isinstance(exc, sa_exc.OperationalError) and "connection" in text:
        return StoreUnavailable
    return StoreError


def retryable(exc: BaseException) -> bool:
    """True when *exc* came from a deadlock or serialization failure: the whole transaction
    may simply be run again (PostgreSQL chose it as the victim)."""
    cause = exc.__cause__
    orig = getattr(cause, "orig", None)
    return getattr(orig, "sqlstate", None) in ("40001", "40P01")


@contextmanager
def store_errors() -> Iterator[None]:
    """Translate SQLAlchemy errors raised inside the block into the store's error tree."""
    try:
        yield
    except (sa_exc.SQLAlchemyError, sqlite3.Error) as exc:
        # sqlite3.Error: raised unwrapped by the BEGIN IMMEDIATE hook in engine.py
        raise _classify(exc)(f"{type(exc).__name__}: {exc}") from exc

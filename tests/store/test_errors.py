"""Driver errors become the store's error tree at the boundary, with the cause attached."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import event
from sqlalchemy import exc as sa_exc

from mailweir.store import (
    ModelStore,
    SchemaTooNew,
    StoreBusy,
    StoreError,
    StoreUnavailable,
    store_errors,
)
from mailweir.store.errors import retryable


class FakePgError(Exception):
    def __init__(self, sqlstate: str) -> None:
        super().__init__(f"pg error {sqlstate}")
        self.sqlstate = sqlstate


def wrapped(orig: Exception) -> sa_exc.OperationalError:
    return sa_exc.OperationalError("SELECT 1", {}, orig)


@pytest.mark.parametrize(
    ("orig", "expected"),
    [
        (sqlite3.OperationalError("database is locked"), StoreBusy),
        (FakePgError("55P03"), StoreBusy),  # lock_not_available (PostgreSQL appendix A)
        (FakePgError("57014"), StoreBusy),  # query_canceled: statement_timeout
        (FakePgError("40P01"), StoreBusy),  # deadlock_detected
        (FakePgError("08006"), StoreUnavailable),  # connection_failure
        (sqlite3.OperationalError("unable to open database file"), StoreUnavailable),
        (sqlite3.OperationalError("no such table: weir_token"), StoreError),
    ],
)
def test_store_errors_classifies_and_chains(orig: Exception, expected: type) -> None:
    error = wrapped(orig)
    with pytest.raises(expected) as caught, store_errors():
        raise error
    assert type(caught.value) is expected
    assert caught.value.__cause__ is error
    assert str(orig) in str(caught.value)


def test_store_errors_raw_sqlite_busy() -> None:
    error = sqlite3.OperationalError("database is locked")
    with pytest.raises(StoreBusy) as caught, store_errors():
        raise error
    assert caught.value.__cause__ is error


def test_store_errors_leaves_other_exceptions_alone() -> None:
    with pytest.raises(KeyError), store_errors():
        raise KeyError("x")


def test_error_tree() -> None:
    for cls in (StoreBusy, StoreUnavailable, SchemaTooNew):
        assert issubclass(cls, StoreError)


def test_locked_sqlite_write_is_store_busy(tmp_path: Path) -> None:
    path = tmp_path / "m.db"
    store = ModelStore.open(str(path))
    blocker = sqlite3.connect(path, isolation_level=None)
    try:
        # Make the store give up at once instead of waiting out the 10 s busy timeout.
        store.engine.dispose()
        event.listen(
            store.engine, "connect", lambda dbapi, _rec: dbapi.execute("PRAGMA busy_timeout=0")
        )
        blocker.execute("BEGIN IMMEDIATE")
        with pytest.raises(StoreBusy):
            store.train(np.array([1], dtype=np.int64), 1, digest=b"x" * 16, source="t")
    finally:
        blocker.close()
        store.close()


def test_unreachable_postgres_is_store_unavailable() -> None:
    # Port 9 (discard) on the loopback: nothing listens there in the test environment.
    with pytest.raises(StoreUnavailable):
        ModelStore.open("postgresql+psycopg://nobody@127.0.0.1:9/none?connect_timeout=2")


@pytest.mark.parametrize(
    ("sqlstate", "expected"), [("40P01", True), ("40001", True), ("55P03", False)]
)
def test_retryable_only_for_deadlock_and_serialization(sqlstate: str, expected: bool) -> None:
    with pytest.raises(StoreError) as caught, store_errors():
        raise wrapped(FakePgError(sqlstate))
    assert retryable(caught.value) is expected

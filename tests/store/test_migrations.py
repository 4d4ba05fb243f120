"""Schema migrations: named, ordered, recorded once, safe to run again."""

from __future__ import annotations

import time
from collections.abc import Callable

import pytest
from sqlalchemy import create_engine, inspect, text

from mailweir.store import ModelStore, SchemaTooNew, StoreUnavailable
from mailweir.store.migrations import MIGRATIONS, applied_migrations, migrate

EXPECTED_TABLES = {
    "weir_token",
    "weir_class_total",
    "weir_ledger",
    "weir_meta",
    "weir_schema",
    "weir_verdict",
    "weir_feedback",
}


def test_migrations_recorded_in_order(store_url: str) -> None:
    engine = create_engine(store_url)
    try:
        assert migrate(engine) == [name for name, _ in MIGRATIONS]
        with engine.connect() as conn:
            assert applied_migrations(conn) == [name for name, _ in MIGRATIONS]
            assert set(inspect(conn).get_table_names()) >= EXPECTED_TABLES
    finally:
        engine.dispose()


def test_migrations_idempotent_on_reopen(open_store: Callable[..., ModelStore]) -> None:
    first = open_store()
    first.set_meta("method", "fisher")
    second = open_store()
    with second.engine.connect() as conn:
        names = applied_migrations(conn)
        rows = conn.execute(text("SELECT COUNT(*) FROM weir_class_total")).scalar()
    assert names == [name for name, _ in MIGRATIONS]
    assert rows == 2
    assert second.get_meta("method") == "fisher"
    assert migrate(second.engine) == []


def test_migration_names_are_unique_and_sorted() -> None:
    names = [name for name, _ in MIGRATIONS]
    assert names == sorted(set(names))


def test_schema_too_new_is_refused(open_store: Callable[..., ModelStore], store_url: str) -> None:
    store = open_store()
    with store.engine.begin() as conn:
        conn.execute(
            text("INSERT INTO weir_schema (name, applied_at) VALUES ('9999_from_the_future', :t)"),
            {"t": time.time()},
        )
    with pytest.raises(SchemaTooNew, match="9999_from_the_future"):
        ModelStore.open(store_url)


def test_open_without_create_needs_a_schema(store_url: str) -> None:
    if store_url.startswith("sqlite"):
        create_engine(store_url).connect().close()  # an empty database file
    with pytest.raises(StoreUnavailable, match="no mailweir schema"):
        ModelStore.open(store_url, create=False)


def test_open_without_create_uses_existing_schema(
    open_store: Callable[..., ModelStore], store_url: str
) -> None:
    open_store().set_meta("method", "bernoulli")
    again = ModelStore.open(store_url, create=False)
    try:
        assert again.get_meta("method") == "bernoulli"
    finally:
        again.close()

"""Fixtures for the store tests: one database URL per backend, each test on an empty schema.

SQLite always runs.  PostgreSQL runs when MAILWEIR_TEST_POSTGRES_URL names a database the
tests may wipe (every weir_ table is dropped before each test), for example
postgresql+psycopg://mailweir@127.0.0.1:5432/mailweir_test.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from postgres_helpers import BACKENDS, empty_postgres_database

from mailweir.store import ModelStore


@pytest.fixture(params=BACKENDS)
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'model.db'}"
    return empty_postgres_database()


@pytest.fixture
def open_store(store_url: str) -> Iterator[Callable[..., ModelStore]]:
    """Open stores on the test database; all are closed at the end of the test."""
    opened: list[ModelStore] = []

    def _open(**kwargs: object) -> ModelStore:
        store = ModelStore.open(store_url, **kwargs)  # type: ignore[arg-type]
        opened.append(store)
        return store

    yield _open
    for store in opened:
        store.close()


@pytest.fixture
def store(open_store: Callable[..., ModelStore]) -> ModelStore:
    return open_store()

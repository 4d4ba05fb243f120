"""Fixtures for the store tests: one database URL per backend, each test on an empty schema.

SQLite always runs.  PostgreSQL runs when MAILWEIR_TEST_POSTGRES_URL names a database the
tests may wipe (every weir_ table is dropped before each test), for example
postgresql+psycopg://mailweir@127.0.0.1:5432/mailweir_test.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, inspect, text

from mailweir.store import ModelStore

POSTGRES_ENV = "MAILWEIR_TEST_POSTGRES_URL"


def _backends() -> list:
    params = [pytest.param("sqlite", id="sqlite")]
    params.append(
        pytest.param(
            "postgresql",
            id="postgresql",
            marks=[
                pytest.mark.postgres,
                pytest.mark.skipif(
                    not os.environ.get(POSTGRES_ENV), reason=f"{POSTGRES_ENV} is not set"
                ),
            ],
        )
    )
    return params


def drop_weir_tables(url: str) -> None:
    engine = create_engine(url)
    try:
        with engine.begin() as conn:
            for name in inspect(conn).get_table_names():
                if name.startswith("weir_"):
                    conn.execute(text(f'DROP TABLE "{name}" CASCADE'))
    finally:
        engine.dispose()


@pytest.fixture(params=_backends())
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'model.db'}"
    url = os.environ[POSTGRES_ENV]
    drop_weir_tables(url)
    return url


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

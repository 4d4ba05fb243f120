"""The PostgreSQL database the tests may wipe, shared by every test folder.

PostgreSQL tests run when MAILWEIR_TEST_POSTGRES_URL names a database whose weir_ tables the
tests may drop, for example postgresql+psycopg://mailweir@127.0.0.1:5432/mailweir_test
(``.ci/run`` starts one); otherwise they are skipped.
"""

from __future__ import annotations

import os

import pytest
from sqlalchemy import create_engine, inspect, text

POSTGRES_ENV = "MAILWEIR_TEST_POSTGRES_URL"

# A test parametrized over the two backends the store supports.
BACKENDS = [
    pytest.param("sqlite", id="sqlite"),
    pytest.param(
        "postgresql",
        id="postgresql",
        marks=[
            pytest.mark.postgres,
            pytest.mark.skipif(
                not os.environ.get(POSTGRES_ENV), reason=f"{POSTGRES_ENV} is not set"
            ),
        ],
    ),
]


def drop_weir_tables(url: str) -> None:
    engine = create_engine(url)
    try:
        with engine.begin() as conn:
            for name in inspect(conn).get_table_names():
                if name.startswith("weir_"):
                    conn.execute(text(f'DROP TABLE "{name}" CASCADE'))
    finally:
        engine.dispose()


def empty_postgres_database() -> str:
    """The URL in ``MAILWEIR_TEST_POSTGRES_URL`` with every weir_ table dropped (the caller
    skips when it is unset)."""
    url = os.environ[POSTGRES_ENV]
    drop_weir_tables(url)
    return url

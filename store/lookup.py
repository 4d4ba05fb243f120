"""The hot read: counts for a few hundred token hashes in one statement.

The statement is plain driver SQL (``exec_driver_sql``): it skips SQLAlchemy's compilation,
which costs about as much as SQLite's own work for this query, yet still passes through the
engine's cursor events.  SQLite gets ``IN (?, ...)`` with the placeholder count rounded up to
a power of two (padding repeats a hash), so a handful of statement texts cover every message
and stay in the driver's prepared-statement cache, and answers in one row of text
(``group_concat``), which a thread reads without giving up the interpreter lock at every row
(``packed_chunks``).  PostgreSQL gets one array parameter.  Whole-table reads (preload, the
presence filter, the vocabulary summary) come in packed chunks too, on both.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy import Connection

from mailweir.model.types import TokenCounts, TokenHashes
from mailweir.store.engine import sqlite_variable_limit

_SELECT = "SELECT hash, ham, spam FROM weir_token WHERE hash"
_PG_SQL = f"{_SELECT} = ANY(CAST(%s AS BIGINT[]))"
# SQLite answers in one row of text (see ``packed_chunks``): a lookup of 300 hashes in a worker
# thread while the event loop kept the interpreter lock busy took 176 ms row by row, 14 packed
# (alone 0.53 and 0.44 ms).
_SQLITE_PACKED = "SELECT group_concat(hash || ',' || ham || ',' || spam) FROM weir_token WHERE hash"
_MIN_BUCKET = 16
_NO_ROWS = np.zeros((0, 3), dtype=np.int64)


def _sqlite_bucket(n: int, limit: int) -> int:
    return min(limit, max(_MIN_BUCKET, 1 << (n - 1).bit_length()))


class CountReader:
    """Builds and caches the lookup statement texts for one dialect."""

    def __init__(self, dialect_name: str) -> None:
        self.postgres = dialect_name == "postgresql"
        # Largest power of two within SQLite's bound-parameter limit.
        self.limit = 1 << (sqlite_variable_limit().bit_length() - 1)
        self._texts: dict[int, str] = {}

    def statements(self, n: int) -> int:
        """How many statements a lookup of *n* distinct hashes issues."""
        return 1 if self.postgres or n <= self.limit else -(-n // self.limit)

    def fetch(self, conn: Connection, hashes: TokenHashes) -> TokenCounts:
        """Counts aligned with *hashes* (unique), zeros for hashes with no row."""
        return self._fetch(hashes, lambda statement, params: _plain_rows(conn, statement, params))

    def fetch_sqlite(self, dbapi_connection: Any, hashes: TokenHashes) -> TokenCounts:
        """``fetch`` straight through a sqlite3 connection, past SQLAlchemy's execution
        context, which costs several times SQLite's own work for the few hashes of one
        message (and so past the engine's cursor events)."""
        return self._fetch(
            hashes, lambda statement, params: dbapi_connection.execute(statement, params).fetchall()
        )

    def _fetch(
        self, hashes: TokenHashes, rows_of: Callable[[str, tuple[Any, ...]], list[Any]]
    ) -> TokenCounts:
        values = np.asarray(hashes, dtype=np.int64)
        counts = np.zeros((len(values), 2), dtype=np.int64)
        if not len(values):
            return counts
        if self.postgres:
            # Plain tuples: numpy would probe each SQLAlchemy Row as a mapping, very slowly.
            rows = rows_of(_PG_SQL, (values.tolist(),))
            found = np.array(rows, dtype=np.int64).reshape(-1, 3)
        else:
            packed: list[npt.NDArray[np.int64]] = []
            for start in range(0, len(values), self.limit):
                part = values[start : start + self.limit].tolist()
                size = _sqlite_bucket(len(part), self.limit)
                params = tuple(part + [part[0]] * (size - len(part)))
                (text,) = rows_of(self._sqlite_text(size), params)[0]
                if text:  # NULL when no hash has a row
                    packed.append(np.fromstring(text, dtype=np.int64, sep=","))
            found = np.concatenate(packed).reshape(-1, 3) if packed else _NO_ROWS
        if len(found):
            order = np.argsort(values)
            at = order[np.searchsorted(values, found[:, 0], sorter=order)]
            counts[at] = found[:, 1:]
        return counts

    def _sqlite_text(self, size: int) -> str:
        text = self._texts.get(size)
        if text is None:
            text = self._texts[size] = f"{_SQLITE_PACKED} IN ({','.join('?' * size)})"
        return text


def _plain_rows(conn: Connection, statement: str, params: tuple[Any, ...]) -> list[Any]:
    """The driver's own row tuples: building SQLAlchemy Row objects, then tuples from them,
    cost more than the query on a cold lookup of thousands of hashes."""
    result = conn.exec_driver_sql(statement, params)
    try:
        return list(result.cursor.fetchall())
    finally:
        result.close()


_CHUNK_ROWS = 8192  # rows read at a time when every count is read: about 200 KB of text


def hash_chunks(conn: Connection) -> Iterator[TokenHashes]:
    """Every token's hash, ``_CHUNK_ROWS`` at a time (the presence filter of a model too large
    to hold), inside a transaction: see ``packed_chunks``."""
    for hashes in packed_chunks(conn, "hash", 1):
        yield hashes.reshape(-1)


def packed_count_chunks(conn: Connection) -> Iterator[tuple[TokenHashes, TokenCounts]]:
    """Every token's hash and counts, ``_CHUNK_ROWS`` at a time, for a caller that stores each
    chunk before the next is read (``preload``, the vocabulary summary) inside a transaction:
    the driver's row tuples for a model of a million tokens would take over 100 MB,
    and whole-model arrays and their temporaries as much again (memory freed after a peak
    mostly stays with the process).  Read as ``packed_chunks``."""
    for rows in packed_chunks(conn, "hash || ',' || ham || ',' || spam", 3):
        yield np.ascontiguousarray(rows[:, 0]), np.ascontiguousarray(rows[:, 1:])


def packed_chunks(conn: Connection, columns: str, width: int) -> Iterator[npt.NDArray[np.int64]]:
    """The token table's rows in chunks of ``_CHUNK_ROWS`` hashes, shape (rows, *width*), each
    chunk one statement whose single row the database packs into text (SQLite's
    ``group_concat``, PostgreSQL's ``string_agg``).

    Row by row, the sqlite3 module lets go of the interpreter lock around every step, and a
    thread reading ten million rows while the event loop kept the lock busy got it back about
    once per switch interval: 16,384 rows in 7.5 s, against every row of ten million in 4.6 s
    this way (1.5 s against 3.5 without the contention).  The chunks are separate statements,
    so the caller holds a transaction for one snapshot across them.  Each row's values stay
    together in the text, so the order SQLite concatenates the rows in does not matter.

    On PostgreSQL, psycopg makes every row of a result a Python tuple: preloading a model of
    521,759 tokens took 0.24-0.29 s of this process's CPU in one text a chunk, cache filled
    included, where the rows alone, fetched and made into arrays, took 0.38-0.42 s."""
    if conn.dialect.name == "postgresql":
        sql = (
            f"SELECT string_agg(CAST({columns} AS TEXT), ','), max(hash), count(*) FROM "
            "(SELECT hash, ham, spam FROM weir_token WHERE hash >= %s ORDER BY hash LIMIT %s) "
            "AS chunk"
        )
    else:
        sql = (
            f"SELECT group_concat({columns}), max(hash), count(*) FROM "
            "(SELECT hash, ham, spam FROM weir_token WHERE hash >= ? ORDER BY hash LIMIT ?)"
        )
    low = -(2**63)
    while True:
        text, top, count = conn.exec_driver_sql(sql, (low, _CHUNK_ROWS)).one()
        if not count:
            return
        values = np.fromstring(text, dtype=np.int64, sep=",")
        if len(values) != count * width:
            raise ValueError(f"read {len(values)} values for {count} rows of {width}")
        yield values.reshape(count, width)
        if count < _CHUNK_ROWS or top == 2**63 - 1:
            return
        low = top + 1

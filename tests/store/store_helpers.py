"""Helpers shared by the store tests (fixtures live in conftest.py)."""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from typing import TypeVar

import numpy as np
import pytest
from sqlalchemy import Connection, Engine, event, inspect, text

from mailweir.model.types import Vocabulary
from mailweir.store import ModelStore, migrations

_Result = TypeVar("_Result")


def indexes(conn: Connection, table: str) -> dict[str, list[str]]:
    """The table's indexes by name, each with its columns."""
    return {i["name"]: i["column_names"] for i in inspect(conn).get_indexes(table)}


def sqlite_plans(
    engine: Engine, run: Callable[[], _Result], table: str
) -> tuple[_Result, list[str]]:
    """What *run* returns, and SQLite's query plan (its lines joined by " | ") of each
    statement it sent to *engine* that names *table*."""
    seen: list[tuple[str, object]] = []

    def keep(_conn: object, _cursor: object, statement: str, params: object, *_: object) -> None:
        seen.append((statement, params))

    event.listen(engine, "before_cursor_execute", keep)
    try:
        result = run()
    finally:
        event.remove(engine, "before_cursor_execute", keep)
    plans = []
    with engine.connect() as conn:
        for statement, params in seen:
            if table in statement:
                rows = conn.exec_driver_sql("EXPLAIN QUERY PLAN " + statement, params).all()
                plans.append(" | ".join(str(row[-1]) for row in rows))
    return result, plans


def digest_of(name: str) -> bytes:
    """A 16-byte stand-in for a message digest."""
    return hashlib.blake2b(name.encode(), digest_size=16).digest()


def hashes_of(*tokens: int) -> np.ndarray:
    return np.unique(np.array(tokens, dtype=np.int64))


def dump_model(store: ModelStore) -> dict[str, object]:
    """Everything that defines the model: token rows, class totals, ledger (minus times)."""
    with store.engine.connect() as conn:
        tokens = conn.execute(text("SELECT hash, ham, spam FROM weir_token ORDER BY hash")).all()
        totals = conn.execute(
            text("SELECT label, messages FROM weir_class_total ORDER BY label")
        ).all()
        ledger = conn.execute(text("SELECT digest, label FROM weir_ledger ORDER BY digest")).all()
    return {
        "tokens": [tuple(r) for r in tokens],
        "totals": [tuple(r) for r in totals],
        "ledger": [(bytes(d), label) for d, label in ledger],
    }


def empty_model(store: ModelStore) -> None:
    """Delete all training (keeping the schema) and advance the revision so caches notice."""
    with store.engine.begin() as conn:
        conn.execute(text("DELETE FROM weir_token"))
        conn.execute(text("DELETE FROM weir_ledger"))
        conn.execute(text("UPDATE weir_class_total SET messages = 0, revision = revision + 2"))


def vocabulary_parts(vocabulary: Vocabulary) -> tuple[int, list[int], list[list[int]]]:
    """Plain values for comparing (the dataclass holds arrays, so == is ambiguous)."""
    return (
        vocabulary.size,
        np.asarray(vocabulary.token_total).tolist(),
        np.asarray(vocabulary.count_histogram).tolist(),
    )


def migrate_first(engine: Engine, count: int, monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Apply only the first *count* migrations, as an older release left the database;
    return their names.  The full list is back in place afterwards."""
    monkeypatch.setattr(migrations, "MIGRATIONS", migrations.MIGRATIONS[:count])
    try:
        return migrations.migrate(engine)
    finally:
        monkeypatch.undo()


def truth(store: ModelStore, hashes: np.ndarray) -> list[list[int]]:
    """The counts the token rows hold for *hashes* (zero where there is no row): the oracle
    every lookup through memory must match."""
    rows = {h: [ham, spam] for h, ham, spam in dump_model(store)["tokens"]}  # type: ignore[misc]
    return [rows.get(int(h), [0, 0]) for h in hashes]


def random_write(
    store: ModelStore,
    other: ModelStore,
    rng: np.random.Generator,
    tokens: np.ndarray,
    step: int,
    trained: list[tuple[np.ndarray, bytes]],
    action: int,
) -> None:
    """One seeded step of the mixed-writes tests, by *action* (0-5, drawn by the caller
    before *tokens*): *store* trains (0, 1) or untrains (2), *other* (another process)
    trains (3), *store* preloads (4) or prunes (5)."""
    if action <= 1:
        digest = digest_of(f"m{step}")
        store.train(tokens, int(rng.integers(0, 2)), digest=digest, source="t")
        trained.append((tokens, digest))
    elif action == 2 and trained:
        tokens, digest = trained.pop(int(rng.integers(0, len(trained))))
        store.untrain(tokens, digest=digest)
    elif action == 3:
        other.train(tokens, 1, digest=digest_of(f"o{step}"), source="t")  # spam
    elif action == 4:
        store.preload()
    else:
        store.prune(max_count=1, unseen_days=0, today=10**6)

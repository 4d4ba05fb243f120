"""weir_ledger_trained_at (migration 0004): the model gauges' newest training time from the
index, not from a scan of every ledger entry (one per message ever trained)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from sqlalchemy import create_engine, text
from store_helpers import indexes, migrate_first, sqlite_plans

from mailweir.store import ModelStore, reports
from mailweir.store.migrations import migrate


def test_migration_0004_indexes_the_ledger_of_a_0003_database(
    store_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    engine = create_engine(store_url)
    try:
        assert migrate_first(engine, 3, monkeypatch)[-1] == "0003_verdict_window_index"
        with engine.begin() as conn:
            assert indexes(conn, "weir_ledger") == {}
            conn.execute(
                text(
                    "INSERT INTO weir_ledger (digest, label, trained_at, source) "
                    "VALUES (:digest, 1, 1764720000.5, 'feedback')"
                ),
                {"digest": b"k" * 16},
            )
        assert migrate(engine) == ["0004_ledger_trained_at_index"]
        with engine.connect() as conn:
            assert indexes(conn, "weir_ledger") == {"weir_ledger_trained_at": ["trained_at"]}
            row = conn.execute(text("SELECT digest, trained_at FROM weir_ledger")).one()
        assert tuple(row) == (b"k" * 16, 1764720000.5)
    finally:
        engine.dispose()


def test_newest_training_time_is_read_from_the_index(
    open_store: Callable[..., ModelStore],
) -> None:
    """SQLite's plan for the gauges' newest ledger entry: a search of the index (its last
    entry), where without it every ledger row is scanned."""
    store = open_store()
    if store.engine.dialect.name != "sqlite":
        pytest.skip("EXPLAIN QUERY PLAN is SQLite's")
    for n in range(1, 30):
        store.train(np.arange(n, n + 5, dtype=np.int64), n % 2, digest=bytes([n]) * 16, source="t")
    summary, plans = sqlite_plans(
        store.engine, lambda: reports.model_summary(store.engine, tokens=33), "weir_ledger"
    )
    assert summary.last_trained_at is not None
    assert plans
    for plan in plans:
        assert "weir_ledger_trained_at" in plan and "SCAN weir_ledger" not in plan, plan

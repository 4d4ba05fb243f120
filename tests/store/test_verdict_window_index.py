"""weir_verdict_window (migration 0003): the rate gauges count a window without its rows.

A verdict row carries the message's token hashes, so each is about a page of the file; the
gauges' refresh every minute used to read every row of its windows through the arrival-time
index, and under load left tens of MB of the file mapped.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import pytest
from sqlalchemy import create_engine, text
from store_helpers import indexes, migrate_first, sqlite_plans

from mailweir.store import ModelStore, reports
from mailweir.store.migrations import migrate
from mailweir.store.verdicts import VerdictRecord


def test_migration_0003_replaces_the_arrival_index_on_a_0002_database(
    store_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    engine = create_engine(store_url)
    try:
        assert migrate_first(engine, 2, monkeypatch) == ["0001_initial", "0002_verdict_sender_list"]
        with engine.begin() as conn:
            assert indexes(conn, "weir_verdict") == {"weir_verdict_received_at": ["received_at"]}
            conn.execute(
                text(
                    "INSERT INTO weir_verdict (tracking_id, received_at, recipients, size, "
                    "score, band, action) VALUES ('kept', 7.0, 1, 10, 0.2, 'ham', 'pass')"
                )
            )
        assert migrate(engine)[0] == "0003_verdict_window_index"  # and any newer after it
        with engine.connect() as conn:
            assert indexes(conn, "weir_verdict") == {
                "weir_verdict_window": ["received_at", "band", "tracking_id"]
            }
            row = conn.execute(text("SELECT tracking_id, band FROM weir_verdict")).one()
        assert tuple(row) == ("kept", "ham")
    finally:
        engine.dispose()


def test_window_counts_read_the_index_alone(open_store: Callable[..., ModelStore]) -> None:
    """SQLite's query plan for the gauges' count of a window's verdicts by band: a covering
    index, so no verdict row (and no page of token hashes) is read."""
    store = open_store()
    if store.engine.dialect.name != "sqlite":
        pytest.skip("EXPLAIN QUERY PLAN is SQLite's")
    now = time.time()
    store.record_verdicts(
        [
            VerdictRecord(f"{n:016x}", now - n, 1, 4096, 0.1, "ham", "tag", None)
            for n in range(1, 50)
        ]
    )
    rates, plans = sqlite_plans(
        store.engine, lambda: reports.misfiling_rates(store.engine, 3600.0, now=now), "weir_verdict"
    )
    assert rates.judged == 49
    counting = [plan for plan in plans if "weir_feedback" not in plan]
    assert counting and all("COVERING INDEX weir_verdict_window" in p for p in counting)
    assert not any("SCAN weir_verdict" in plan for plan in plans)

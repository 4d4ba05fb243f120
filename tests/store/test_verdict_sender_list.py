"""weir_verdict.sender_list (migration 0002): added to old databases, written and read back."""

from __future__ import annotations

from collections.abc import Callable

import pytest
from sqlalchemy import create_engine, inspect, text
from store_helpers import migrate_first

from mailweir.store import ModelStore
from mailweir.store.migrations import MIGRATIONS, migrate
from mailweir.store.verdicts import VerdictRecord


def test_migration_0002_adds_sender_list_to_a_0001_database(
    store_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    engine = create_engine(store_url)
    try:
        # A database as the first release left it: only 0001 applied, one verdict row.
        assert migrate_first(engine, 1, monkeypatch) == ["0001_initial"]
        with engine.begin() as conn:
            assert "sender_list" not in {
                c["name"] for c in inspect(conn).get_columns("weir_verdict")
            }
            conn.execute(
                text(
                    "INSERT INTO weir_verdict (tracking_id, received_at, recipients, size, "
                    "score, band, action) VALUES ('old', 1.0, 1, 10, 0.2, 'ham', 'pass')"
                )
            )
        assert migrate(engine) == [name for name, _ in MIGRATIONS[1:]]  # up to the newest
        with engine.connect() as conn:
            row = conn.execute(text("SELECT band, sender_list FROM weir_verdict")).one()
        assert tuple(row) == ("ham", None)
    finally:
        engine.dispose()


def test_verdict_sender_list_round_trip(open_store: Callable[..., ModelStore]) -> None:
    store = open_store()
    listed = VerdictRecord("0000000000000001", 5.0, 2, 300, None, "listed", "reject", None, "block")
    scored = VerdictRecord("0000000000000002", 6.0, 1, 200, 0.1, "ham", "pass", None)
    store.record_verdicts([listed, scored])
    assert store.find_verdict(listed.tracking_id) == listed
    assert store.find_verdict(scored.tracking_id) == scored
    assert scored.sender_list is None

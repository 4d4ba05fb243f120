"""Upkeep in the store: trimming the verdict log, tidying SQLite, the last-run stamps."""

from __future__ import annotations

from pathlib import Path

from mailweir.store import ModelStore, VerdictRecord, maintenance

DAY = 86400.0
NOW = 1_796_000_000.0  # 2026-11-30, an arbitrary fixed "now"


def verdict(tracking_id: str, received_at: float) -> VerdictRecord:
    return VerdictRecord(tracking_id, received_at, 1, 2048, 0.02, "ham", "pass", None)


def ids(store: ModelStore) -> list[str]:
    with store.engine.connect() as conn:
        rows = conn.exec_driver_sql("SELECT tracking_id FROM weir_verdict ORDER BY tracking_id")
        return [row[0] for row in rows]


def test_trim_verdicts_removes_only_rows_older_than_the_cutoff(store: ModelStore) -> None:
    cutoff = NOW - 400 * DAY
    old = [verdict(f"old-{n}", cutoff - 1 - n * DAY) for n in range(7)]
    kept = [verdict("at-cutoff", cutoff), verdict("new", NOW - DAY)]
    store.record_verdicts(old + kept)
    # Batches of 3 over 7 rows: three transactions (3 + 3 + 1), every old row gone.
    assert maintenance.trim_verdicts(store, cutoff, batch=3) == 7
    assert ids(store) == ["at-cutoff", "new"]
    assert maintenance.trim_verdicts(store, cutoff) == 0


def test_trim_verdicts_on_an_empty_log(store: ModelStore) -> None:
    assert maintenance.trim_verdicts(store, NOW) == 0


def test_tidy_checkpoints_sqlite_or_skips_postgresql(store: ModelStore) -> None:
    store.record_verdicts([verdict(f"hl-{n}", NOW) for n in range(500)])
    result = maintenance.tidy(store)
    if store.engine.dialect.name != "sqlite":
        assert not result.done and "autovacuum" in result.note
        return
    assert result.done and not result.busy
    assert result.wal_bytes > 0  # the writes above sat in the WAL
    wal = Path(f"{store.engine.url.database}-wal")
    assert not wal.exists() or wal.stat().st_size == 0  # TRUNCATE emptied it
    assert len(ids(store)) == 500  # and nothing was lost on the way


def test_stamp_round_trip(store: ModelStore) -> None:
    assert maintenance.last_run(store, "prune") is None
    maintenance.stamp(store, "prune", NOW)
    maintenance.stamp(store, "prune", NOW + 5.5)
    assert maintenance.last_run(store, "prune") == NOW + 5.5
    assert maintenance.last_run(store, "tidy") is None

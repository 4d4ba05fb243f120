"""Scheduled upkeep (daemon/upkeep.py) and `mailweir upkeep`, on SQLite and PostgreSQL."""

from __future__ import annotations

import asyncio
import concurrent.futures
import dataclasses
import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from postgres_helpers import BACKENDS, empty_postgres_database
from prometheus_client import CollectorRegistry
from smtp_helpers import LOCAL, NextHop, daemon_settings
from sqlalchemy import text

from mailweir.daemon import cli, upkeep
from mailweir.daemon.service import Service
from mailweir.daemon.settings import HostPort, HttpSettings, ModelSettings, UpkeepSettings
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore, VerdictRecord, maintenance

DAY = 86400.0


@pytest.fixture(params=BACKENDS)
def store(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[ModelStore]:
    if request.param == "sqlite":
        url = str(tmp_path / "model.sqlite3")
    else:
        url = empty_postgres_database()
    opened = ModelStore.open(url)
    yield opened
    opened.close()


def _age_tokens(store: ModelStore, hashes: list[int], days: int) -> None:
    """Pretend these tokens were last trained ``days`` ago."""
    with store.engine.begin() as conn:
        conn.execute(
            text("UPDATE weir_token SET last_seen = last_seen - :d WHERE hash = :h"),
            [{"d": days, "h": h} for h in hashes],
        )


def _tokens(store: ModelStore) -> list[int]:
    with store.engine.connect() as conn:
        return [r[0] for r in conn.execute(text("SELECT hash FROM weir_token ORDER BY hash"))]


def test_upkeep_prune_removes_rare_stale_tokens_only(store: ModelStore) -> None:
    # 11 and 12 are in one message each; 21 in two; 31 in one but recently seen.
    store.train(np.array([11, 21], dtype=np.int64), HAM, digest=b"a" * 16, source="test")
    store.train(np.array([12, 21], dtype=np.int64), SPAM, digest=b"b" * 16, source="test")
    store.train(np.array([31], dtype=np.int64), HAM, digest=b"c" * 16, source="test")
    _age_tokens(store, [11, 12, 21], 90)
    _age_tokens(store, [31], 10)
    result = upkeep.run_task(store, UpkeepSettings(prune_unseen_days=60), "prune")
    assert result.ok and result.removed == 2
    assert _tokens(store) == [21, 31]
    assert store.class_count().tolist() == [2, 1]  # message totals untouched
    assert maintenance.last_run(store, "prune") is not None


def test_upkeep_trim_keeps_verdicts_inside_the_window(store: ModelStore) -> None:
    now = time.time()
    records = [
        VerdictRecord(f"v{age}", now - age * DAY, 1, 100, 0.1, "ham", "pass", None)
        for age in (1, 399, 401, 800)
    ]
    store.record_verdicts(records)
    result = upkeep.run_task(store, UpkeepSettings(verdict_keep_days=400), "trim", now=now)
    assert result.ok and result.removed == 2
    assert store.find_verdict("v399") is not None and store.find_verdict("v401") is None


def test_upkeep_tidy_runs_on_both_backends(store: ModelStore) -> None:
    result = upkeep.run_task(store, UpkeepSettings(), "tidy")
    assert result.ok and result.removed == 0
    sqlite = store.engine.dialect.name == "sqlite"
    assert ("WAL checkpoint" in result.detail) == sqlite
    assert ("skipped" in result.detail) == (not sqlite)


def _locked(**_: Any) -> int:
    raise RuntimeError("database is locked")


async def test_upkeep_failure_is_counted_not_raised(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    store = ModelStore.open(str(tmp_path / "model.sqlite3"))
    monkeypatch.setattr(store, "prune", _locked)
    metrics = upkeep.UpkeepMetrics(CollectorRegistry())
    runner = upkeep.Upkeep(store, UpkeepSettings(), metrics)
    result = await runner.run("prune")
    assert not result.ok and "database is locked" in result.detail
    assert metrics.failures.labels("prune")._value.get() == 1
    assert metrics.last_run.labels("prune")._value.get() == 0
    # The failed run gave its lease back: the retry is not kept off by itself.
    assert maintenance.claim(store, "prune", time.time(), every=3600, lease=60).taken
    store.close()


# -- one schedule for several processes on one database ---------------------------------------


def _second(store: ModelStore) -> ModelStore:
    """Another process's view of the same database (its own engine and connections)."""
    return ModelStore.open(store.engine.url.render_as_string(hide_password=False))


def test_upkeep_lease_keeps_another_process_off_until_given_back(store: ModelStore) -> None:
    other = _second(store)
    try:
        now = 1_000_000.0
        assert maintenance.claim(store, "prune", now, every=3600, lease=600).taken
        busy = maintenance.claim(other, "prune", now + 1, every=3600, lease=600)
        assert (busy.taken, busy.reason, busy.due) == (False, "running elsewhere", now + 600)
        assert maintenance.claim(other, "trim", now + 1, every=3600, lease=600).taken  # per task
        maintenance.stamp(store, "prune", now + 5)
        maintenance.release(store, "prune")
        # Finished elsewhere within its interval: not repeated on schedule, but by hand it is.
        done = maintenance.claim(other, "prune", now + 10, every=3600, lease=600)
        assert (done.taken, done.reason, done.due) == (False, "finished elsewhere", now + 3605)
        assert maintenance.claim(other, "prune", now + 10, every=None, lease=600).taken
    finally:
        other.close()


def test_upkeep_lease_of_a_dead_holder_ends_by_itself(store: ModelStore) -> None:
    other = _second(store)
    try:
        assert maintenance.claim(store, "tidy", 5000.0, every=60, lease=100).taken  # then "dies"
        assert not maintenance.claim(other, "tidy", 5099.0, every=60, lease=100).taken
        assert maintenance.claim(other, "tidy", 5100.0, every=60, lease=100).taken
    finally:
        other.close()


def test_upkeep_lease_race_has_one_winner(store: ModelStore) -> None:
    """Eight processes' stores ask at the same moment: the compare-and-set lets one through
    (SQLite: writers serialise on BEGIN IMMEDIATE; PostgreSQL: the conditional upsert)."""
    others = [_second(store) for _ in range(8)]
    start = threading.Barrier(len(others))

    def ask(one: ModelStore) -> bool:
        start.wait(timeout=30)
        return maintenance.claim(one, "trim", 7000.0, every=3600, lease=600).taken

    try:
        for round_ in range(3):  # bounded: three races, each from a free lease
            with concurrent.futures.ThreadPoolExecutor(len(others)) as pool:
                won = list(pool.map(ask, others))
            assert won.count(True) == 1, (round_, won)
            maintenance.release(store, "trim")
    finally:
        for one in others:
            one.close()


async def test_upkeep_two_daemons_run_each_task_once(store: ModelStore) -> None:
    """Two schedulers on one database, every task overdue: each task runs in one of them, the
    other counts it skipped and waits for the interval instead of repeating it.

    A scheduler that reads the task stamps after the other has already run a task (a slow
    machine) never tries it: it sees the stamp and waits the interval.  So a task is skipped
    by the other scheduler, or not tried by it at all, but never run twice."""
    other = _second(store)
    hourly = UpkeepSettings(prune_every_hours=1, trim_every_hours=1, tidy_every_hours=1)
    registries = [CollectorRegistry(), CollectorRegistry()]
    runners = [
        upkeep.Upkeep(one, hourly, upkeep.UpkeepMetrics(registry), first_delay=0.0)
        for one, registry in zip((store, other), registries, strict=True)
    ]

    def results() -> list[upkeep.TaskResult]:
        return [result for runner in runners for result in runner.runs]

    def all_ran() -> bool:
        return {r.task for r in results() if not r.skipped} == set(upkeep.TASKS)

    try:
        # Both read the stamps before either runs a task (the usual case; see above).
        await asyncio.gather(*(runner.start() for runner in runners))
        for _ in range(600):  # bounded: at most about 30 s on a slow machine
            if all_ran() and len(results()) >= 2 * len(upkeep.TASKS):
                break
            await asyncio.sleep(0.05)
        assert all_ran(), results()
        await asyncio.sleep(0.5)  # room for a second run, were one to come
        for task in upkeep.TASKS:
            ran = [r for r in results() if r.task == task and not r.skipped]
            skipped = [r for r in results() if r.task == task and r.skipped]
            assert len(ran) == 1 and ran[0].ok, (task, results())
            assert len(skipped) <= 1, (task, results())
            for skip in skipped:  # the other's run, plus the interval
                assert skip.due is not None and skip.due > time.time() + 3000
        skips = [
            sum(
                registry.get_sample_value("mailweir_upkeep_skipped_total", {"task": task}) or 0
                for task in upkeep.TASKS
            )
            for registry in registries
        ]
        assert sum(skips) == sum(r.skipped for r in results())
        assert len(results()) <= 2 * len(upkeep.TASKS)
    finally:
        for runner in runners:
            await runner.stop()
        other.close()


def test_upkeep_command_leaves_a_task_running_elsewhere(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    database = tmp_path / "model.sqlite3"
    daemon_side = ModelStore.open(str(database))
    assert maintenance.claim(daemon_side, "prune", time.time(), every=None, lease=600).taken
    assert cli.main(["upkeep", "--db", str(database), "--task", "prune"]) == 0
    assert capsys.readouterr().out.startswith("prune: skipped: running elsewhere")
    maintenance.release(daemon_side, "prune")
    daemon_side.close()
    assert cli.main(["upkeep", "--db", str(database), "--task", "prune"]) == 0
    assert capsys.readouterr().out.startswith("prune: ok")


def test_upkeep_intervals_zero_switches_a_task_off() -> None:
    every = upkeep.intervals(UpkeepSettings(prune_every_hours=0, tidy_every_hours=0.5))
    assert every == {"trim": 24 * 3600.0, "tidy": 1800.0}


def _sample(service: Service, name: str, task: str) -> float:
    value = service.metrics.registry.get_sample_value(name, {"task": task})
    assert value is not None, name
    return value


@pytest.mark.slow
async def test_upkeep_runs_inside_the_daemon_and_moves_the_metrics(
    tmp_path: Path, next_hop: NextHop, monkeypatch: pytest.MonkeyPatch
) -> None:
    database = tmp_path / "model.sqlite3"
    seeded = ModelStore.open(str(database))
    old = time.time() - 500 * DAY
    seeded.record_verdicts(
        [VerdictRecord(f"old{n}", old, 1, 100, 0.1, "ham", "pass", None) for n in range(3)]
    )
    seeded.close()
    monkeypatch.setattr(upkeep, "FIRST_DELAY", 0.0)
    every = 0.5 / 3600  # half a second
    settings = dataclasses.replace(
        daemon_settings(next_hop.address),
        state_dir=tmp_path,
        model=ModelSettings(database=str(database), scoring_workers=1),
        http=HttpSettings(listen=HostPort(LOCAL, 0)),
        upkeep=UpkeepSettings(
            prune_every_hours=every, trim_every_hours=every, tidy_every_hours=every
        ),
    )
    service = Service(settings)
    await service.startup()
    try:
        assert service.upkeep is not None
        for _ in range(400):  # bounded: at most about 20 s on a slow machine
            if len(service.upkeep.runs) >= 6:
                break
            await asyncio.sleep(0.05)
        tasks = [run.task for run in service.upkeep.runs]
        assert {"prune", "trim", "tidy"} <= set(tasks) and tasks.count("tidy") >= 2
        assert all(run.ok for run in service.upkeep.runs)
        for task in upkeep.TASKS:
            assert _sample(service, "mailweir_upkeep_last_run_timestamp_seconds", task) > old
            assert _sample(service, "mailweir_upkeep_failures_total", task) == 0
        assert _sample(service, "mailweir_upkeep_removed_rows_total", "trim") == 3
        assert "mailweir_upkeep_duration_seconds" in service.metrics.render().decode()
    finally:
        await service.shutdown(grace=5)


def test_upkeep_command_runs_every_task(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    database = tmp_path / "model.sqlite3"
    ModelStore.open(str(database)).close()
    assert cli.main(["upkeep", "--db", str(database), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert [t["task"] for t in report["tasks"]] == ["prune", "trim", "tidy"]
    assert all(t["ok"] for t in report["tasks"])
    assert cli.main(["upkeep", "--db", str(database), "--task", "tidy"]) == 0
    assert capsys.readouterr().out.startswith("tidy: ok")


def test_upkeep_command_bad_config_and_missing_database(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    config = tmp_path / "mailweir.toml"
    config.write_text("[upkeep]\nverdict_keep_days = 0\n")
    assert cli.main(["upkeep", "--config", str(config)]) == 2
    assert "upkeep.verdict_keep_days" in capsys.readouterr().err
    assert cli.main(["upkeep", "--db", str(tmp_path / "absent.sqlite3")]) == 1
    assert not (tmp_path / "absent.sqlite3").exists()  # by-hand upkeep never creates one

"""Model upkeep inside the daemon, and ``mailweir upkeep`` to run it by hand.

Three tasks, each on its own interval (``[upkeep]`` settings; 0 switches a task off):

* ``prune``: rare tokens not seen for a while (:meth:`ModelStore.prune`);
* ``trim``: verdict rows older than ``upkeep.verdict_keep_days``;
* ``tidy``: SQLite's WAL checkpoint and ``PRAGMA optimize`` (nothing on PostgreSQL).

One asyncio task, started by the Service, sleeps until the next task is due and runs it in a
worker thread, so mail keeps flowing; the store's own locking keeps the writes apart.  Each
run is stamped in the database: after a restart a task runs when it is due by the stamp (but
not in the first minute, which belongs to getting mail moving again).  Every run shows in the
metrics, and a failed one is logged, counted and tried again after at most an hour.

Daemons that share one PostgreSQL model share the schedule too: each run first takes the
task's lease in the database (``store/maintenance.py`` ``claim``), so one process runs a task
while the others skip it, and a task finished elsewhere within its interval is not run again.
``mailweir upkeep`` takes the same lease, so it never runs a task beside a daemon running it.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import functools
import logging
import os
import sys
import time
from dataclasses import asdict, dataclass
from typing import Any, Final

from prometheus_client import CollectorRegistry, Counter, Gauge

from mailweir.daemon.background import stop_task
from mailweir.daemon.command_args import config_arguments, json_argument, print_report
from mailweir.daemon.config import load_settings
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import UpkeepSettings
from mailweir.store import maintenance

log = logging.getLogger("mailweir.upkeep")

TASKS: Final = maintenance.TASKS
DAY: Final = 86400.0
FIRST_DELAY: Final = 60.0  # seconds after start before an overdue task runs
RETRY_AFTER: Final = 3600.0  # most seconds before a failed task is tried again
# How long a run's lease keeps other processes off the task.  A holder that dies frees it
# after this; a run that outlasts it (none has come close) may meet a second one, which only
# repeats idempotent deletes.
LEASE: Final = 2 * 3600.0


class UpkeepMetrics:
    """``mailweir_upkeep_*``, labelled by task; every task's series exists from the start."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.last_run = Gauge(
            "mailweir_upkeep_last_run_timestamp_seconds",
            "Unix time the upkeep task last finished without error (0: not yet; read from the "
            "database's stamp at start).",
            ["task"],
            registry=registry,
        )
        self.duration = Gauge(
            "mailweir_upkeep_duration_seconds",
            "How long the upkeep task's last run took, successful or not.",
            ["task"],
            registry=registry,
        )
        self.removed = Counter(
            "mailweir_upkeep_removed_rows",
            "Rows the upkeep task deleted (prune: tokens, trim: verdict rows).",
            ["task"],
            registry=registry,
        )
        self.failures = Counter(
            "mailweir_upkeep_failures",
            "Upkeep runs that failed (logged; tried again after at most an hour).",
            ["task"],
            registry=registry,
        )
        self.skipped = Counter(
            "mailweir_upkeep_skipped",
            "Upkeep runs left to another process on the same database (it held the task's "
            "lease, or had finished the task within its interval).",
            ["task"],
            registry=registry,
        )
        for task in TASKS:
            metrics = (self.last_run, self.duration, self.removed, self.failures, self.skipped)
            for metric in metrics:
                metric.labels(task)


@dataclass(frozen=True)
class TaskResult:
    task: str
    ok: bool
    removed: int
    seconds: float
    detail: str
    skipped: bool = False  # left to another process; ``due`` says when to look again
    due: float | None = None


def run_task(
    store: Any,
    settings: UpkeepSettings,
    task: str,
    now: float | None = None,
    *,
    every: float | None = None,
) -> TaskResult:
    """Take the task's lease, run it to the end (blocking: call it in a worker thread), stamp
    it and give the lease back.  ``every``: the task's interval, so a run another process
    finished less than that ago is not repeated (None, as by hand: run it anyway).  A failure
    becomes a result with ``ok=False``; its traceback is logged here."""
    now = time.time() if now is None else now
    started = time.monotonic()
    try:
        lease = maintenance.claim(store, task, now, every=every, lease=LEASE)
    except Exception as exc:
        log.exception("upkeep %s: could not take its lease", task)
        return TaskResult(task, False, 0, time.monotonic() - started, f"failed: {exc}")
    if not lease.taken:
        detail = f"skipped: {lease.reason}"
        return TaskResult(task, True, 0, 0.0, detail, skipped=True, due=lease.due)
    try:
        removed, detail = _do(store, settings, task, now)
        maintenance.stamp(store, task, time.time())
    except Exception as exc:
        log.exception("upkeep %s failed", task)
        return TaskResult(task, False, 0, time.monotonic() - started, f"failed: {exc}")
    finally:
        _release(store, task)
    return TaskResult(task, True, removed, time.monotonic() - started, detail)


def _release(store: Any, task: str) -> None:
    try:
        maintenance.release(store, task)
    except Exception:  # the lease then ends by itself, LEASE after it was taken
        log.exception("upkeep %s: could not give its lease back", task)


def _do(store: Any, settings: UpkeepSettings, task: str, now: float) -> tuple[int, str]:
    if task == "prune":
        removed = store.prune(
            max_count=settings.prune_max_count, unseen_days=settings.prune_unseen_days
        )
        return removed, (
            f"{removed} tokens seen in at most {settings.prune_max_count} messages and in none "
            f"for {settings.prune_unseen_days} days"
        )
    if task == "trim":
        removed = maintenance.trim_verdicts(store, now - settings.verdict_keep_days * DAY)
        return removed, f"{removed} verdict rows older than {settings.verdict_keep_days} days"
    if task == "tidy":
        done = maintenance.tidy(store)
        if not done.done:
            return 0, f"{done.backend}: skipped, {done.note}"
        busy = (
            "; another connection kept it from finishing (next run tries again)"
            if done.busy
            else ""
        )
        return 0, f"sqlite: WAL checkpoint ({done.wal_bytes} bytes) and optimize{busy}"
    raise ValueError(f"unknown upkeep task {task!r}; expected one of {', '.join(TASKS)}")


def intervals(settings: UpkeepSettings) -> dict[str, float]:
    """Seconds between runs of each task that is switched on."""
    hours = {
        "prune": settings.prune_every_hours,
        "trim": settings.trim_every_hours,
        "tidy": settings.tidy_every_hours,
    }
    return {task: h * 3600.0 for task, h in hours.items() if h > 0}


class Upkeep:
    """The daemon's scheduled upkeep: one asyncio task, the work in worker threads."""

    def __init__(
        self,
        store: Any,
        settings: UpkeepSettings,
        metrics: UpkeepMetrics | None = None,
        *,
        first_delay: float | None = None,
    ) -> None:
        """``first_delay``: seconds after start before an overdue task runs (FIRST_DELAY)."""
        self._store = store
        self._settings = settings
        self._metrics = metrics
        self._first_delay = FIRST_DELAY if first_delay is None else first_delay
        self._task: asyncio.Task[None] | None = None
        self._working: asyncio.Future[TaskResult] | None = None
        self.runs: list[TaskResult] = []  # the latest runs, newest last (tests, status)

    async def start(self) -> None:
        every = intervals(self._settings)
        if self._task is not None or not every:
            return
        stamps = await asyncio.to_thread(self._read_stamps)
        now, soonest = time.time(), time.time() + self._first_delay
        due = {}
        for task, seconds in every.items():
            last = stamps.get(task)
            if last is not None and self._metrics is not None:
                self._metrics.last_run.labels(task).set(last)
            due[task] = max(soonest, (last + seconds) if last is not None else now)
        self._task = asyncio.create_task(self._run(due, every), name="mailweir-upkeep")

    async def stop(self) -> None:
        """Stop the schedule; a task already running in its thread is let finish."""
        await stop_task(self._task)
        self._task = None
        if self._working is not None:
            with contextlib.suppress(Exception):
                await self._working
            self._working = None

    async def run(self, task: str, every: float | None = None) -> TaskResult:
        """Run one task now, in a worker thread, and count it in the metrics (``every``: as
        :func:`run_task` takes it)."""
        call = functools.partial(run_task, self._store, self._settings, task, every=every)
        work = asyncio.ensure_future(asyncio.to_thread(call))
        self._working = work
        result = await asyncio.shield(work)  # a stop() waits for the thread instead
        self._working = None
        self._account(result)
        return result

    def _read_stamps(self) -> dict[str, float]:
        stamps = {task: maintenance.last_run(self._store, task) for task in TASKS}
        return {task: at for task, at in stamps.items() if at is not None}

    def _account(self, result: TaskResult) -> None:
        self.runs = [*self.runs[-99:], result]
        if result.skipped:
            log.info("upkeep %s: %s", result.task, result.detail)
            if self._metrics is not None:
                self._metrics.skipped.labels(result.task).inc()
            return
        if result.ok:
            log.info("upkeep %s: %s in %.2f s", result.task, result.detail, result.seconds)
        if self._metrics is None:
            return
        m = self._metrics
        m.duration.labels(result.task).set(result.seconds)
        if result.ok:
            m.last_run.labels(result.task).set(time.time())
            m.removed.labels(result.task).inc(result.removed)
        else:
            m.failures.labels(result.task).inc()

    async def _run(self, due: dict[str, float], every: dict[str, float]) -> None:
        while True:
            await asyncio.sleep(max(0.0, min(due.values()) - time.time()))
            for task in TASKS:
                if task in due and due[task] <= time.time():
                    result = await self.run(task, every[task])
                    if result.skipped and result.due is not None:  # another process's
                        due[task] = max(result.due, time.time() + 1.0)
                        continue
                    wait = every[task] if result.ok else min(every[task], RETRY_AFTER)
                    due[task] = time.time() + wait


# -- `mailweir upkeep` ----------------------------------------------------------------------


def add_command(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = sub.add_parser(
        "upkeep",
        help="run the daemon's upkeep tasks once, now",
        description="Prune rare tokens, trim old verdict rows and tidy the database (SQLite: "
        "WAL checkpoint and optimize), as the daemon does on its schedule, with the [upkeep] "
        "settings of the configuration file.  Safe while the daemon runs.",
    )
    config_arguments(parser)
    parser.add_argument(
        "--task", action="append", choices=TASKS, help="run only this task (repeatable)"
    )
    json_argument(parser)
    parser.set_defaults(handler=upkeep_command)


def upkeep_command(args: argparse.Namespace) -> int:
    """0 when every task ran, 1 when one failed, 2 for a bad configuration."""
    from mailweir.store import ModelStore, StoreError

    flags = {"model.database": args.db} if args.db else {}
    try:
        settings = load_settings(args.config, dict(os.environ), flags, {"model.database": "--db"})
    except ConfigError as exc:
        print(f"mailweir: configuration error: {exc}", file=sys.stderr)
        return 2
    try:
        store = ModelStore.open(settings.database, create=False)
    except StoreError as exc:
        print(f"mailweir: cannot open {settings.database}: {exc}", file=sys.stderr)
        return 1
    try:
        results = [run_task(store, settings.upkeep, task) for task in args.task or TASKS]
    finally:
        store.close()
    report = {"database": settings.database, "tasks": [asdict(r) for r in results]}
    lines = [
        f"{r.task}: {r.detail}"
        if r.skipped
        else f"{r.task}: {'ok' if r.ok else 'FAILED'}, {r.detail} ({r.seconds:.2f} s)"
        for r in results
    ]
    print_report(args, report, lines)
    return 0 if all(r.ok for r in results) else 1

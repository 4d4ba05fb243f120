"""Upkeep on a model of realistic size: seconds per task, and how long verdict writes wait.

Trains synthetic mail (bench_store's Zipf-like messages), ages every token by 90 days so the
rare ones are prunable, and fills the verdict log with rows of which half are past
``upkeep.verdict_keep_days``.  Then runs prune, trim and tidy as the daemon does, while a
writer thread records one verdict batch every 10 ms as the verdict log would; the writer's
longest wait shows how long a task holds the write lock.

    python bench/bench_upkeep.py [--messages 3000] [--verdicts 200000]
    python bench/bench_upkeep.py --url postgresql+psycopg://mailweir@127.0.0.1:54329/bench
"""

from __future__ import annotations

import argparse
import tempfile
import threading
import time
from pathlib import Path

from bench_store import digest, synthetic_messages
from sqlalchemy import text

from mailweir.daemon import upkeep
from mailweir.daemon.settings import UpkeepSettings
from mailweir.store import ModelStore, VerdictRecord

DAY = 86400.0


def fill(store: ModelStore, messages: int, verdicts: int) -> None:
    items = [(h, i % 2, digest(h), "bench") for i, h in enumerate(synthetic_messages(messages))]
    store.train_many(items)
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE weir_token SET last_seen = last_seen - 90"))
    now = time.time()
    for start in range(0, verdicts, 10_000):
        store.record_verdicts(
            [
                VerdictRecord(f"b{n:09d}", now - (n % 800) * DAY, 1, 4000, 0.1, "ham", "pass", None)
                for n in range(start, min(start + 10_000, verdicts))
            ]
        )


def writer(store: ModelStore, task: str, stop: threading.Event, waits: list[float]) -> None:
    n = 0
    while not stop.is_set():
        batch = [
            VerdictRecord(f"{task}{n:07d}-{i}", time.time(), 1, 900, 0.2, "ham", "pass", None)
            for i in range(20)
        ]
        started = time.monotonic()
        store.record_verdicts(batch)
        waits.append(time.monotonic() - started)
        n += 1
        time.sleep(0.01)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=3000)
    parser.add_argument("--verdicts", type=int, default=200_000)
    parser.add_argument("--url", help="database URL (default: a SQLite file in a temp folder)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        target = args.url or str(Path(folder) / "model.sqlite3")
        store = ModelStore.open(target)
        fill(store, args.messages, args.verdicts)
        stats = store.stats()
        print(
            f"{stats.backend}: {stats.tokens} tokens, {stats.verdict_rows} verdict rows, "
            f"{stats.database_bytes / 1e6:.1f} MB"
        )
        settings = UpkeepSettings()
        for task in upkeep.TASKS:
            waits: list[float] = []
            stop = threading.Event()
            thread = threading.Thread(target=writer, args=(store, task, stop, waits))
            thread.start()
            result = upkeep.run_task(store, settings, task)
            stop.set()
            thread.join()
            waits.sort()
            print(
                f"{task:5s} {result.seconds:7.2f} s  removed {result.removed:7d}  "
                f"verdict writes during it: {len(waits)}, median wait "
                f"{1000 * waits[len(waits) // 2]:.1f} ms, longest {1000 * waits[-1]:.1f} ms  "
                f"({result.detail})"
            )
        store.close()


if __name__ == "__main__":
    main()

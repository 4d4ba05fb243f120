"""What the verdict journal costs the reply: one line written before the upstream hears 250.

Two figures, each with the journal and without it (its folder blocked by a file, so the
daemon runs as before the journal existed):

1. ``VerdictLog.add`` alone: microseconds per verdict of 300 token hashes (the journal's JSON
   line and its write(2) are the whole difference).
2. Through a real daemon on 127.0.0.1: milliseconds per message, one upstream connection
   sending messages one after another (median and 95th percentile), rounds alternated so
   machine noise hits both sides alike (each round in the other order).

    .venv/bin/python bench/bench_verdict_journal.py [--messages 300] [--rounds 2]

Prints figures; asserts nothing.
"""

from __future__ import annotations

import argparse
import asyncio
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TESTS = Path(__file__).resolve().parents[1] / "tests"
sys.path[:0] = [str(TESTS / "reliability"), str(TESTS / "daemon")]

import aiosmtplib  # noqa: E402
from reliability_helpers import (  # noqa: E402
    LOCAL,
    RECIPIENT,
    SENDER,
    FaultyNextHop,
    load_message,
    running_service,
    service_settings,
    trained_store,
)

from mailweir.daemon.verdict_journal import FOLDER  # noqa: E402
from mailweir.daemon.verdict_log import VerdictLog  # noqa: E402
from mailweir.store.verdicts import VerdictRecord  # noqa: E402


class NoStore:
    def record_verdicts(self, records: list[VerdictRecord]) -> None:
        pass

    def find_verdict(self, tracking_id: str) -> None:
        return None


async def add_cost(journal: bool, count: int = 20_000) -> float:
    """Microseconds per VerdictLog.add of a 300-hash record."""
    rng = np.random.default_rng(1)
    records = [
        VerdictRecord(
            f"id{i}", time.time(), 1, 4000, 0.01, "ham", "tag", rng.integers(-(2**62), 2**62, 300)
        )
        for i in range(count)
    ]
    with tempfile.TemporaryDirectory() as folder:
        log = VerdictLog(
            NoStore(),
            3600,
            batch_size=10**9,
            max_pending=10**9,
            journal_dir=Path(folder) / FOLDER if journal else None,
        )
        await log.start()
        started = time.perf_counter()
        for record in records:
            log.add(record)
        seconds = time.perf_counter() - started
        await log.close()
    return seconds / count * 1e6


async def per_message(journal: bool, messages: int) -> list[float]:
    """Seconds per message through a daemon, one connection, one message after another."""
    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        trained_store(tmp / "model.sqlite3")
        if not journal:
            (tmp / "state").mkdir()
            (tmp / "state" / FOLDER).write_text("blocked: run without the journal")
        sink = FaultyNextHop()
        await sink.start()
        rng = random.Random(3)
        raws = [load_message(i, rng) for i in range(messages)]
        times: list[float] = []
        try:
            async with running_service(service_settings(tmp, sink.address)) as service:
                client = aiosmtplib.SMTP(hostname=LOCAL, port=service.smtp_address.port)
                await client.connect()
                for raw in raws:
                    started = time.perf_counter()
                    await client.sendmail(SENDER, [RECIPIENT], raw)
                    times.append(time.perf_counter() - started)
                await client.quit()
        finally:
            await sink.stop()
    return times[10:]  # without the warm-up (caches, process pool)


async def main(messages: int, rounds: int) -> None:
    for journal in (False, True, False, True):
        print(f"add(), journal {'on ' if journal else 'off'}: {await add_cost(journal):7.1f} µs")
    results: dict[bool, list[float]] = {False: [], True: []}
    for round_number in range(rounds):
        order = (False, True) if round_number % 2 == 0 else (True, False)
        for journal in order:
            results[journal] += await per_message(journal, messages)
    for journal, times in results.items():
        ms = sorted(t * 1000 for t in times)
        p95 = ms[int(0.95 * (len(ms) - 1))]
        print(
            f"per message, journal {'on ' if journal else 'off'}: median "
            f"{statistics.median(ms):.2f} ms, p95 {p95:.2f} ms ({len(ms)} messages)"
        )


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--messages", type=int, default=300)
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    asyncio.run(main(args.messages, args.rounds))

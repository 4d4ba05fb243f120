"""The daemon killed with SIGKILL while transactions are in flight, then started again.

The daemon runs as its own process (``python -m mailweir.daemon.cli run --config ...``), as
in production; the test is its upstream and its next hop.  The next hop takes a moment over
each message, so the kill lands in the middle of DATA for several connections at once.
Oracle: everything the upstream got 250 for is at the next hop; everything else it still
holds, and after the restart its retry delivers it.  The SQLite file survives the kill
(PRAGMA integrity_check says "ok", sqlite.org/pragma.html#pragma_integrity_check).

The verdict log writes its rows in batches (every 5 s here, so the kill surely finds rows
queued); the verdict journal (daemon/verdict_journal.py) must bring every one of them back at
the restart: after it, each message the upstream got 250 for before the kill has its row,
found by the tracking id in the copy the next hop received, and no tracking id has two rows.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import random
import re
import signal
import sqlite3
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
from reliability_helpers import (
    LOCAL,
    FaultyNextHop,
    Ledger,
    check_nothing_lost,
    load_message,
    message_id,
    trained_store,
    upstream,
    verdict_rows,
)
from smtp_helpers import free_port

COUNT = 200
CLIENTS = 8
START_SECONDS = 60.0  # the most a cold start (store, process pool) may take before we give up
_TRACKING_ID = re.compile(rb"^Mailweir-Id:[ \t]*(\S+)", re.IGNORECASE | re.MULTILINE)
_REPLAYED = re.compile(r"verdict journal: (\d+) records left by the last run, (\d+) of them")


def write_config(tmp_path: Path, sink_port: int, smtp_port: int) -> Path:
    config = tmp_path / "mailweir.toml"
    config.write_text(
        f"""state_dir = "{tmp_path / "state"}"

[smtp]
listen = "{LOCAL}:{smtp_port}"
hostname = "filter.harbourlane.example"

[next_hop]
address = "{LOCAL}:{sink_port}"
helo_name = "filter.harbourlane.example"
connect_timeout = 5
command_timeout = 5
data_timeout = 5

[policy]
mode = "enforce"
min_trained = 5
ham_action = "tag"

[model]
database = "{tmp_path / "model.sqlite3"}"

[http]
listen = "{LOCAL}:{free_port()}"

[log]
verdict_batch_seconds = 5
""",
        encoding="utf-8",
    )
    return config


@contextlib.contextmanager
def daemon_process(config: Path, log: Path) -> Iterator[subprocess.Popen[bytes]]:
    """The daemon in a session of its own, so its pool workers can be found and ended."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("MAILWEIR_")}
    with log.open("ab") as out:
        process = subprocess.Popen(
            [sys.executable, "-m", "mailweir.daemon.cli", "run", "--config", str(config)],
            stdout=out,
            stderr=out,
            env=env,
            start_new_session=True,
        )
    try:
        yield process
    finally:
        if process.poll() is None:
            process.terminate()
            try:
                process.wait(20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(5)
        # Whatever the daemon left behind in its own process group (pool workers).
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGKILL)


def tracking_ids(sink: FaultyNextHop) -> dict[str, set[str]]:
    """Message id -> the tracking ids of its delivered copies.  A message has two copies when
    the kill cut its first one off after the next hop took it: the upstream never heard 250
    for that copy (its verdict may be gone with the process) and sent the message again."""
    found: dict[str, set[str]] = {}
    for delivery in sink.deliveries:
        match = _TRACKING_ID.search(delivery.content.split(b"\r\n\r\n", 1)[0])
        if match:
            key = message_id(delivery.content) or "?"
            found.setdefault(key, set()).add(match.group(1).decode("ascii"))
    return found


def unlogged(accepted: set[str], copies: dict[str, set[str]], logged: set[str]) -> set[str]:
    """The accepted messages none of whose copies has a verdict row: the 250 copy has none."""
    return {key for key in accepted if not copies.get(key, set()) & logged}


def logged_tracking_ids(database: Path) -> tuple[set[str], int]:
    """The tracking ids in the verdict log, and how many rows it has."""
    with sqlite3.connect(database) as conn:
        ids = [row[0] for row in conn.execute("SELECT tracking_id FROM weir_verdict")]
    return set(ids), len(ids)


async def wait_listening(port: int, process: subprocess.Popen[bytes], log: Path) -> None:
    loop = asyncio.get_running_loop()
    deadline = loop.time() + START_SECONDS
    while loop.time() < deadline:
        assert process.poll() is None, log.read_text(errors="replace")
        try:
            _, writer = await asyncio.open_connection(LOCAL, port)
        except OSError:
            await asyncio.sleep(0.1)
            continue
        writer.close()
        await writer.wait_closed()
        return
    raise AssertionError(f"daemon not listening after {START_SECONDS}s:\n{log.read_text()}")


@pytest.mark.slow
async def test_crash_sigkill_mid_transaction_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    trained_store(tmp_path / "model.sqlite3")
    rng = random.Random(5)
    messages = {f"load-{i}@mail.example": load_message(i, rng) for i in range(COUNT)}
    ledger = Ledger()
    smtp_port = free_port()
    config = write_config(tmp_path, sink.address.port, smtp_port)
    log = tmp_path / "daemon.log"
    sink.behaviour.delay_at_data = 0.05
    in_flight_at_kill = 0

    with daemon_process(config, log) as first:
        await wait_listening(smtp_port, first, log)

        watching = False

        async def kill(sent: int) -> None:
            """From a third of the way on, kill as soon as a transaction is open at the sink.

            One client watches the sink (every millisecond, for at most 10 s) while the others
            go on sending, so the kill waits for a transaction instead of hoping to meet one."""
            nonlocal in_flight_at_kill, watching
            if sent < COUNT // 3 or watching or first.poll() is not None:
                return
            watching = True
            for _ in range(10_000):
                in_flight_at_kill = sum(1 for p in sink.protocols if p.envelope.rcpt_tos)
                if in_flight_at_kill:
                    break
                await asyncio.sleep(0.001)
            os.kill(first.pid, signal.SIGKILL)
            first.wait(10)

        await upstream(smtp_port, messages, ledger, clients=CLIENTS, timeout=20, between=kill)
    assert first.returncode == -signal.SIGKILL
    assert in_flight_at_kill > 0, "the kill never caught a transaction in flight"
    at_kill = check_nothing_lost(messages, ledger, sink)
    rows_after_kill = verdict_rows(tmp_path / "model.sqlite3")
    with sqlite3.connect(tmp_path / "model.sqlite3") as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    before_kill = ledger.accepted()
    assert before_kill <= tracking_ids(sink).keys()  # every accepted copy carries its id
    logged_at_kill = logged_tracking_ids(tmp_path / "model.sqlite3")[0]
    missing_at_kill = unlogged(before_kill, tracking_ids(sink), logged_at_kill)
    assert missing_at_kill, "the kill found no verdict row still queued: nothing to prove"

    sink.behaviour.delay_at_data = 0.0
    with daemon_process(config, log) as second:
        await wait_listening(smtp_port, second, log)
        held = {key: messages[key] for key in ledger.held()}
        await upstream(smtp_port, held, ledger, clients=CLIENTS, timeout=20)
        second.send_signal(signal.SIGTERM)
        await asyncio.to_thread(second.wait, 30)
    assert second.returncode == 0, log.read_text(errors="replace")
    figures = check_nothing_lost(messages, ledger, sink)
    assert figures["accepted"] == COUNT, figures
    logged, rows = logged_tracking_ids(tmp_path / "model.sqlite3")
    lost_rows = unlogged(before_kill, tracking_ids(sink), logged)
    assert not lost_rows, f"verdict rows lost with the kill: {sorted(lost_rows)[:5]}"
    assert rows == len(logged)  # one row per tracking id (it is the table's key)
    assert not unlogged(ledger.accepted(), tracking_ids(sink), logged)  # the second run's too
    replayed = _REPLAYED.search(log.read_text(errors="replace"))
    assert replayed is not None, "the restart did not replay the journal"
    print(
        f"\nFAULT | daemon SIGKILLed mid-transaction, restarted | {at_kill} | "
        f"in_flight_at_kill={in_flight_at_kill} | after_retry_accepted={figures['accepted']} | "
        f"duplicated by the retry={figures['duplicates_on_retry']} | "
        f"verdict rows: {rows_after_kill} written at the kill, {len(missing_at_kill)} of the "
        f"{len(before_kill)} accepted messages' rows still queued then | replayed at restart: "
        f"{replayed.group(1)} journal records, {replayed.group(2)} rows written | "
        f"lost after restart={len(lost_rows)} | rows={rows} for {len(logged)} tracking ids"
    )

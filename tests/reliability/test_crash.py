"""The daemon killed with SIGKILL while transactions are in flight, then started again.

The daemon runs as its own process (``python -m mailweir.daemon.cli run --config ...``), as
in production; the test is its upstream and its next hop.  The next hop takes a moment over
each message, so the kill lands in the middle of DATA for several connections at once.
Oracle: everything the upstream got 250 for is at the next hop; everything else it still
holds, and after the restart its retry delivers it.  The SQLite file survives the kill
(PRAGMA integrity_check says "ok", sqlite.org/pragma.html#pragma_integrity_check).
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import random
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
    trained_store,
    upstream,
    verdict_rows,
)
from smtp_helpers import free_port

COUNT = 200
CLIENTS = 8
START_SECONDS = 60.0  # the most a cold start (store, process pool) may take before we give up


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
verdict_batch_seconds = 0.2
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

        async def kill(sent: int) -> None:
            """From a third of the way on, kill as soon as a transaction is open at the sink."""
            nonlocal in_flight_at_kill
            if sent < COUNT // 3 or first.poll() is not None:
                return
            in_flight_at_kill = sum(1 for p in sink.protocols if p.envelope.rcpt_tos)
            if in_flight_at_kill or sent >= COUNT // 2:
                os.kill(first.pid, signal.SIGKILL)
                first.wait(10)

        await upstream(smtp_port, messages, ledger, clients=CLIENTS, timeout=20, between=kill)
    assert first.returncode == -signal.SIGKILL
    assert in_flight_at_kill > 0, "the kill never caught a transaction in flight"
    at_kill = check_nothing_lost(messages, ledger, sink)
    rows_after_kill = verdict_rows(tmp_path / "model.sqlite3")
    with sqlite3.connect(tmp_path / "model.sqlite3") as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"

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
    print(
        f"\nFAULT | daemon SIGKILLed mid-transaction, restarted | {at_kill} | "
        f"in_flight_at_kill={in_flight_at_kill} | after_retry_accepted={figures['accepted']} | "
        f"duplicated by the retry={figures['duplicates_on_retry']} | "
        f"verdict rows lost with the kill={at_kill['accepted'] - rows_after_kill}"
    )

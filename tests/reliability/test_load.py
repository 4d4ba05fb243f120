"""Load: thousands of messages from concurrent upstream connections through a real daemon.

Oracle: the upstream's own record of answers against what the next hop received (every 250
arrived exactly once, byte for byte apart from Mailweir-* fields) and the verdict log's rows
after shutdown flushed it (one per message judged).  CI sends MAILWEIR_LOAD_MESSAGES (default
2,000) from MAILWEIR_LOAD_CLIENTS (default 32) connections; bench/load.py runs 20,000.
"""

from __future__ import annotations

import os
import random
import time
from pathlib import Path

import pytest
from reliability_helpers import (
    FaultyNextHop,
    Ledger,
    check_nothing_lost,
    load_message,
    running_service,
    service_settings,
    trained_store,
    upstream,
    verdict_rows,
)

MESSAGES = int(os.environ.get("MAILWEIR_LOAD_MESSAGES", "2000"))
CLIENTS = int(os.environ.get("MAILWEIR_LOAD_CLIENTS", "32"))


async def run_load(
    tmp_path: Path, sink: FaultyNextHop, count: int, clients: int
) -> dict[str, float]:
    trained_store(tmp_path / "model.sqlite3")
    rng = random.Random(7)
    messages = {f"load-{i}@mail.example": load_message(i, rng) for i in range(count)}
    ledger = Ledger()
    settings = service_settings(tmp_path, sink.address)
    started = time.monotonic()
    async with running_service(settings) as service:
        await upstream(service.smtp_address.port, messages, ledger, clients=clients)
    figures: dict[str, float] = dict(check_nothing_lost(messages, ledger, sink))
    figures["verdict_rows"] = verdict_rows(tmp_path / "model.sqlite3")
    figures["seconds"] = round(time.monotonic() - started, 1)
    figures["worst_message_seconds"] = round(ledger.worst_seconds, 2)
    return figures


@pytest.mark.slow
async def test_load_every_accepted_message_arrives_once_and_is_logged(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    figures = await run_load(tmp_path, sink, MESSAGES, CLIENTS)
    print(f"\nload: {figures}")
    # A healthy next hop: the upstream gets 250 for every message.
    assert figures["accepted"] == MESSAGES, figures
    assert len(sink.deliveries) == MESSAGES
    assert figures["verdict_rows"] == MESSAGES
    assert all(d.content.startswith(b"Mailweir-Verdict: ") for d in sink.deliveries)

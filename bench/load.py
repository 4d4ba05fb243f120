"""Load through a real daemon, by hand: many messages from many upstream connections.

The same oracle as tests/reliability/test_load.py (which CI runs with 2,000 messages): every
message the upstream got 250 for arrived at the next hop exactly once, byte for byte apart
from Mailweir-* fields, and the verdict log has one row per message after shutdown.  With
``--fault-share`` the next hop misbehaves at random (451, 554, reset mid-DATA, stall past the
timeout) and the upstream retries what it still holds once the faults stop.

    python bench/load.py                                  # 20,000 messages, 32 clients
    python bench/load.py --messages 5000 --fault-share 0.2

Everything listens on 127.0.0.1.  Prints figures; asserts only the zero-loss oracle.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import random
import resource
import sys
import tempfile
import time
from pathlib import Path

TESTS = Path(__file__).resolve().parents[1] / "tests"
sys.path[:0] = [str(TESTS / "reliability"), str(TESTS / "daemon")]

from reliability_helpers import (  # noqa: E402
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

FAULTS = ["451 4.3.0 Queue busy", "554 5.6.0 Content refused", "reset", "stall"]


async def main(messages: int, clients: int, fault_share: float, relay_timeout: float) -> None:
    sink = FaultyNextHop()
    await sink.start()
    rng = random.Random(1)
    if fault_share:
        sink.fault = lambda content: rng.choice(FAULTS) if rng.random() < fault_share else None
    batch = {f"load-{i}@mail.example": load_message(i, random.Random(i)) for i in range(messages)}
    ledger = Ledger()
    with tempfile.TemporaryDirectory(prefix="mailweir-load-") as tmp:
        tmp_path = Path(tmp)
        trained_store(tmp_path / "model.sqlite3")
        settings = service_settings(tmp_path, sink.address, relay_timeout=relay_timeout)
        started = time.monotonic()
        try:
            async with running_service(settings) as service:
                port = service.smtp_address.port
                await upstream(port, batch, ledger, clients=clients)
                first = check_nothing_lost(batch, ledger, sink)
                sent_seconds = time.monotonic() - started
                sink.fault = lambda content: None
                held = {key: batch[key] for key in ledger.held()}
                await upstream(port, held, ledger, clients=clients)
        finally:
            await sink.stop()
        figures = check_nothing_lost(batch, ledger, sink)
        rows = verdict_rows(tmp_path / "model.sqlite3")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"messages {messages}, clients {clients}, fault share {fault_share}")
    print(f"first pass:  {first}")
    print(f"after retry: {figures}")
    print(f"faults injected: {dict(sink.faults)}")
    print(
        f"verdict rows: {rows} (attempts that reached DATA: {ledger.attempts - ledger.replies[0]})"
    )
    print(f"first pass {sent_seconds:.1f} s = {messages / sent_seconds:.0f} msg/s")
    print(
        f"worst single transaction {ledger.worst_seconds:.2f} s; "
        f"peak RSS of this process {rss:.0f} MB"
    )


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--messages", type=int, default=20_000)
    parser.add_argument("--clients", type=int, default=32)
    parser.add_argument("--fault-share", type=float, default=0.0)
    parser.add_argument("--relay-timeout", type=float, default=10.0)
    args = parser.parse_args()
    # Every injected fault is logged as a warning by the daemon; the figures say it all.
    logging.getLogger("mailweir").setLevel(logging.ERROR)
    asyncio.run(main(args.messages, args.clients, args.fault_share, args.relay_timeout))

"""Faults injected while messages flow: the next hop and the database misbehave, and still
no message is lost.

Each test sends a batch through a real daemon while one fault is on, then (where the fault
can end) clears it and lets the upstream retry what it still holds, as a mail server would.
The oracle is reliability_helpers.check_nothing_lost: every 250 arrived exactly once and
byte for byte; everything else is still the upstream's (4xx or no answer) or was refused for
good (5xx, bounced by the upstream).  Each test prints its row of the fault table.
"""

from __future__ import annotations

import asyncio
import random
import sqlite3
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

import pytest
from reliability_helpers import (
    LOCAL,
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
from sqlalchemy import event

from mailweir.daemon.settings import HostPort
from mailweir.store import engine as store_engine

COUNT = 240
CLIENTS = 16
RELAY_TIMEOUT = 1.0  # small, so a stalled next hop costs a second, not ten minutes


def batch(seed: int, count: int = COUNT) -> dict[str, bytes]:
    rng = random.Random(seed)
    return {f"load-{i}@mail.example": load_message(i, rng) for i in range(count)}


def row(fault: str, figures: dict[str, Any]) -> None:
    print(f"\nFAULT | {fault} | " + " | ".join(f"{k}={v}" for k, v in figures.items()))


async def retry_held(port: int, messages: dict[str, bytes], ledger: Ledger) -> None:
    """The upstream's next queue run: everything it still holds, once more."""
    held = {key: messages[key] for key in ledger.held()}
    await upstream(port, held, ledger, clients=CLIENTS)


class Gate:
    """A TCP pass-through in front of the next hop that can go down (refuse connections and
    reset the ones open, as a next hop restarting does) and come back on the same port."""

    def __init__(self, target: HostPort, cut_share: float = 0.0) -> None:
        self.target = target
        self.port = 0
        self.cut_share = cut_share  # share of message contents cut off halfway (then RST)
        self.cuts = 0
        self._rng = random.Random(11)
        self._server: asyncio.Server | None = None
        self._writers: set[asyncio.StreamWriter] = set()

    async def up(self) -> None:
        self._server = await asyncio.start_server(self._pipe, LOCAL, self.port)
        self.port = self._server.sockets[0].getsockname()[1]

    async def down(self) -> None:
        if self._server is not None:
            self._server.close()
            for writer in list(self._writers):
                writer.transport.abort()
            await self._server.wait_closed()
            self._server = None

    async def _pipe(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self._writers.add(writer)
        try:
            far_reader, far_writer = await asyncio.open_connection(
                self.target.host, self.target.port
            )
        except OSError:
            writer.transport.abort()
            return
        self._writers.add(far_writer)

        async def copy(
            src: asyncio.StreamReader, dst: asyncio.StreamWriter, upstream: bool
        ) -> None:
            after_data = False  # the chunk after a DATA command is message content
            try:
                while data := await src.read(65536):
                    if upstream and after_data and self._rng.random() < self.cut_share:
                        self.cuts += 1
                        dst.write(data[: len(data) // 2])
                        await dst.drain()
                        writer.transport.abort()
                        break
                    after_data = upstream and data.endswith(b"DATA\r\n")
                    dst.write(data)
                    await dst.drain()
            except OSError:
                pass
            finally:
                dst.transport.abort()

        await asyncio.gather(copy(reader, far_writer, True), copy(far_reader, writer, False))
        self._writers.discard(writer)
        self._writers.discard(far_writer)


@asynccontextmanager
async def daemon(tmp_path: Path, next_hop: HostPort, **policy: Any) -> AsyncIterator[Any]:
    trained_store(tmp_path / "model.sqlite3")
    settings = service_settings(tmp_path, next_hop, relay_timeout=RELAY_TIMEOUT, **policy)
    async with running_service(settings) as service:
        yield service


def random_fault(rng: random.Random, share: float, faults: list[str]) -> Callable[[bytes], Any]:
    def choose(content: bytes) -> str | None:
        return rng.choice(faults) if rng.random() < share else None

    return choose


# -- the next hop ------------------------------------------------------------------------------

NEXT_HOP_FAULTS = {
    "next hop answers 451 at random": ["451 4.3.0 Queue busy"],
    "next hop answers 554 at random": ["554 5.6.0 Content refused"],
    "next hop resets mid-DATA": ["reset"],
    "next hop stalls past the timeout": ["stall"],
    "next hop mixes 4xx, 5xx, resets, stalls": [
        "421 4.3.2 Closing",
        "452 4.3.1 Out of space",
        "550 5.7.1 Refused",
        "reset",
        "stall",
    ],
}


@pytest.mark.slow
@pytest.mark.parametrize("fault", list(NEXT_HOP_FAULTS))
async def test_faults_next_hop_misbehaving_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop, fault: str
) -> None:
    messages = batch(1)
    ledger = Ledger()
    sink.fault = random_fault(random.Random(fault), 0.3, NEXT_HOP_FAULTS[fault])
    async with daemon(tmp_path, sink.address) as service:
        port = service.smtp_address.port
        await upstream(port, messages, ledger, clients=CLIENTS)
        first = check_nothing_lost(messages, ledger, sink)
        sink.fault = lambda content: None
        await retry_held(port, messages, ledger)
    figures = check_nothing_lost(messages, ledger, sink)
    # After the retry only the permanent refusals remain outside the next hop.
    assert figures["held"] == 0, figures
    assert figures["accepted"] + figures["bounced"] == COUNT
    assert verdict_rows(tmp_path / "model.sqlite3") == ledger.attempts - ledger.replies[0]
    row(fault, {**first, "after_retry_accepted": figures["accepted"], "faults": dict(sink.faults)})


@pytest.mark.slow
async def test_faults_next_hop_refusing_connections_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    """The next hop goes down for the middle third of the run: open connections are reset,
    new ones refused; it comes back and the upstream's retry delivers the rest."""
    messages = batch(2)
    ledger = Ledger()
    gate = Gate(sink.address)
    await gate.up()

    async def outage(sent: int) -> None:
        if sent == COUNT // 3:
            await gate.down()
        elif sent == 2 * COUNT // 3:
            await gate.up()

    try:
        async with daemon(tmp_path, HostPort(LOCAL, gate.port)) as service:
            port = service.smtp_address.port
            await upstream(port, messages, ledger, clients=CLIENTS, between=outage)
            first = check_nothing_lost(messages, ledger, sink)
            if gate._server is None:
                await gate.up()
            await retry_held(port, messages, ledger)
    finally:
        await gate.down()
    figures = check_nothing_lost(messages, ledger, sink)
    assert first["held"] > 0, "the outage never reached a transaction"
    assert figures["accepted"] == COUNT, figures
    row(
        "next hop refuses connections (down, then back)",
        {**first, "after_retry_accepted": figures["accepted"]},
    )


@pytest.mark.slow
async def test_faults_next_hop_connection_cut_mid_data_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    """The connection to the next hop breaks halfway through the message content (a proxy
    passes half of it, then resets both sides)."""
    messages = batch(5)
    ledger = Ledger()
    gate = Gate(sink.address, cut_share=0.3)
    await gate.up()
    try:
        async with daemon(tmp_path, HostPort(LOCAL, gate.port)) as service:
            port = service.smtp_address.port
            await upstream(port, messages, ledger, clients=CLIENTS)
            first = check_nothing_lost(messages, ledger, sink)
            gate.cut_share = 0.0
            await retry_held(port, messages, ledger)
    finally:
        await gate.down()
    figures = check_nothing_lost(messages, ledger, sink)
    assert gate.cuts > 0 and first["held"] > 0
    assert figures["accepted"] == COUNT, figures
    row(
        "next hop connection reset halfway through the content",
        {**first, "after_retry_accepted": figures["accepted"], "cuts": gate.cuts},
    )


@pytest.mark.slow
async def test_faults_next_hop_refusing_senders_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    """The next hop answers MAIL FROM with 421, 451 or 550 at random (so the upstream hears
    it at RCPT, where the relay opens the next-hop transaction)."""
    messages = batch(6)
    ledger = Ledger()
    rng = random.Random(6)
    choices = ["421 4.3.2 Closing", "451 4.3.0 Busy", "550 5.7.1 Sender refused"]
    sink.mail_fault = lambda: rng.choice(choices) if rng.random() < 0.3 else None
    async with daemon(tmp_path, sink.address) as service:
        port = service.smtp_address.port
        await upstream(port, messages, ledger, clients=CLIENTS)
        first = check_nothing_lost(messages, ledger, sink)
        sink.mail_fault = lambda: None
        await retry_held(port, messages, ledger)
    figures = check_nothing_lost(messages, ledger, sink)
    assert first["held"] > 0 and first["bounced"] > 0, first
    assert figures["held"] == 0 and figures["accepted"] + figures["bounced"] == COUNT
    row(
        "next hop refuses MAIL FROM at random (421/451/550)",
        {**first, "after_retry_accepted": figures["accepted"], "faults": dict(sink.faults)},
    )


# -- the database ------------------------------------------------------------------------------


@pytest.mark.slow
async def test_faults_database_locked_loses_nothing(
    tmp_path: Path, sink: FaultyNextHop, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Another process holds SQLite's write lock for a while; the daemon's busy timeout is
    short.  Mail keeps flowing (scoring reads a WAL snapshot), verdict writes wait and retry,
    and every verdict is in the log after shutdown."""
    pragmas = tuple(
        (name, "100" if name == "busy_timeout" else value)
        for name, value in store_engine.SQLITE_PRAGMAS
    )
    monkeypatch.setattr(store_engine, "SQLITE_PRAGMAS", pragmas)
    messages = batch(3)
    ledger = Ledger()
    database = tmp_path / "model.sqlite3"
    holder: list[sqlite3.Connection] = []

    async with daemon(tmp_path, sink.address) as service:

        async def lock(sent: int) -> None:
            if sent == COUNT // 4:
                conn = sqlite3.connect(database, isolation_level=None)
                conn.execute("BEGIN EXCLUSIVE")
                holder.append(conn)
            elif sent == 3 * COUNT // 4:
                # The mail between may pass faster than the log's batch period: make sure it
                # tries (and fails) to write while the lock is held, or the test shows nothing.
                if not service.verdict_log.write_failures:
                    await service.verdict_log.flush()
                holder.pop().rollback()

        await upstream(service.smtp_address.port, messages, ledger, clients=CLIENTS, between=lock)
        failures = service.verdict_log.write_failures
    figures = check_nothing_lost(messages, ledger, sink)
    rows = verdict_rows(database)
    assert failures > 0, "the lock never got in the verdict log's way"
    assert figures["accepted"] == COUNT
    assert rows == COUNT
    row(
        "database write-locked by another process",
        {**figures, "verdict_write_failures": failures, "verdict_rows": rows},
    )


@pytest.mark.slow
async def test_faults_database_disk_full_loses_nothing(tmp_path: Path, sink: FaultyNextHop) -> None:
    """SQLite's real SQLITE_FULL ("database or disk is full"), raised by capping the file at
    its current size (PRAGMA max_page_count, sqlite.org/pragma.html) on every connection of
    the daemon's store; mail keeps flowing, verdicts wait, and are written once room returns."""
    messages = batch(4)
    ledger = Ledger()
    full = {"on": False}

    async with daemon(tmp_path, sink.address) as service:
        engine = service.store.engine

        @event.listens_for(engine, "connect")
        def cap(dbapi_connection: Any, _record: Any) -> None:
            if full["on"]:
                pages = dbapi_connection.execute("PRAGMA page_count").fetchone()[0]
                dbapi_connection.execute(f"PRAGMA max_page_count={pages}")

        async def disk(sent: int) -> None:
            if sent in (COUNT // 4, 3 * COUNT // 4):
                full["on"] = sent == COUNT // 4
                await service.verdict_log.flush()
                engine.dispose()  # new connections pick the cap up (or lose it)

        await upstream(service.smtp_address.port, messages, ledger, clients=CLIENTS, between=disk)
        failures = service.verdict_log.write_failures
    figures = check_nothing_lost(messages, ledger, sink)
    rows = verdict_rows(tmp_path / "model.sqlite3")
    assert failures > 0, "the cap never got in the verdict log's way"
    assert figures["accepted"] == COUNT
    assert rows == COUNT
    row(
        "database disk full (SQLITE_FULL)",
        {**figures, "verdict_write_failures": failures, "verdict_rows": rows},
    )

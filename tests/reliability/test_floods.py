"""Connection floods against a daemon with the DEFAULT connection settings.

Defaults (daemon/settings.py): smtp.max_connections 200, smtp.reserved_connections 20 for
smtp.reserved_networks (127.0.0.1 and ::1), smtp.max_connections_per_client 20,
smtp.first_command_timeout 30 s, smtp.command_timeout 300 s.  The flooders are other loopback
addresses (127.0.0.2 and up, bound as the source address; Linux routes all of 127.0.0.0/8 to
the loopback interface, from memory: a connect from them would fail otherwise).  They open
connections and stay silent.

Oracle: the flood gets exactly its share (greetings counted, refusals by their enhanced code),
and the well-behaved mail server on 127.0.0.1 delivers on its FIRST attempt while every flood
connection is still open (each answers a NOOP afterwards), so it did not wait for a timeout
to free a slot.  The one time bound is generous: far below the 300 s command timeout.
"""

from __future__ import annotations

import asyncio
from collections import Counter
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiosmtplib
import pytest
from reliability_helpers import (
    LOCAL,
    RECIPIENT,
    SENDER,
    FaultyNextHop,
    message_id,
    running_service,
    service_settings,
    trained_store,
)

from mailweir.daemon.settings import SmtpSettings

DEFAULTS = SmtpSettings()
PER_CLIENT = DEFAULTS.max_connections_per_client  # 20
OUTSIDE_SHARE = DEFAULTS.max_connections - DEFAULTS.reserved_connections  # 180
NOT_WAITED = DEFAULTS.command_timeout / 2  # a generous bound: no 300 s timeout was waited for


@asynccontextmanager
async def default_daemon(tmp_path: Path, sink: FaultyNextHop) -> AsyncIterator[int]:
    trained_store(tmp_path / "model.sqlite3")
    # service_settings shortens the command timeout for other tests; here it is the default.
    settings = service_settings(
        tmp_path, sink.address, smtp={"command_timeout": DEFAULTS.command_timeout}
    )
    assert settings.smtp.max_connections == DEFAULTS.max_connections
    assert settings.smtp.first_command_timeout == DEFAULTS.first_command_timeout
    async with running_service(settings) as service:
        yield service.smtp_address.port


@dataclass
class Flood:
    """Idle connections: how each was answered, and the ones that were let in."""

    answers: Counter[str] = field(default_factory=Counter)  # "220", "421 4.7.0", ...
    held: list[tuple[asyncio.StreamReader, asyncio.StreamWriter]] = field(default_factory=list)

    async def still_open(self) -> int:
        """How many held connections answer a NOOP with 250 (they kept their slot)."""

        async def noop(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> bool:
            try:
                writer.write(b"NOOP\r\n")
                await writer.drain()
                return (await asyncio.wait_for(reader.readline(), 30)).startswith(b"250")
            except (OSError, TimeoutError):
                return False

        return sum(await asyncio.gather(*(noop(r, w) for r, w in self.held)))

    def close(self) -> None:
        for _, writer in self.held:
            writer.close()


async def flood(port: int, sources: list[str], per_source: int) -> Flood:
    """``per_source`` silent connections from each source address, all at once."""
    result = Flood()

    async def one(source: str) -> None:
        try:
            reader, writer = await asyncio.open_connection(LOCAL, port, local_addr=(source, 0))
        except OSError:
            result.answers["connect failed"] += 1
            return
        try:
            line = await asyncio.wait_for(reader.readline(), 60)
        except (OSError, TimeoutError):
            line = b""
        if line.startswith(b"220 "):
            result.answers["220"] += 1
            result.held.append((reader, writer))
        else:
            result.answers[line[:9].decode(errors="replace") or "closed"] += 1
            writer.close()

    await asyncio.gather(*(one(source) for source in sources for _ in range(per_source)))
    return result


async def deliver(port: int, key: str, source: str = LOCAL) -> dict[str, Any]:
    """One message on one connection, no retry: the final code, or the refusal."""
    loop = asyncio.get_running_loop()
    started = loop.time()
    raw = (
        f"From: <{SENDER}>\r\nTo: <{RECIPIENT}>\r\nSubject: vaccine order\r\n"
        f"Message-ID: <{key}>\r\n\r\nThe order arrives on Tuesday.\r\n"
    ).encode()
    client = aiosmtplib.SMTP(hostname=LOCAL, port=port, timeout=60, source_address=(source, 0))
    try:
        await client.connect()
        errors, _ = await client.sendmail(SENDER, [RECIPIENT], raw)
        await client.quit()
        outcome: dict[str, Any] = {"code": 250 if not errors else 0}
    except aiosmtplib.SMTPResponseException as exc:
        outcome = {"code": exc.code, "text": exc.message}
        client.close()
    except (aiosmtplib.SMTPException, OSError, TimeoutError) as exc:
        outcome = {"code": 0, "text": repr(exc)}
        client.close()
    outcome["seconds"] = loop.time() - started
    return outcome


@pytest.mark.slow
async def test_floods_one_address_beyond_its_cap_starves_nobody(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    async with default_daemon(tmp_path, sink) as port:
        idle = await flood(port, ["127.0.0.2"], 3 * PER_CLIENT)
        try:
            upstream = await deliver(port, "upstream@vetsupply.example")
            neighbour = await deliver(port, "neighbour@mail.example", "127.0.0.3")
            open_after = await idle.still_open()
        finally:
            idle.close()
    print(
        f"\nFLOOD | one address, {3 * PER_CLIENT} idle connections | answers {dict(idle.answers)}"
        f" | still open after the deliveries {open_after} | upstream 127.0.0.1 {upstream}"
        f" | another outside address {neighbour}"
    )
    assert idle.answers == {"220": PER_CLIENT, "421 4.7.0": 2 * PER_CLIENT}, idle.answers
    assert open_after == PER_CLIENT
    assert upstream["code"] == 250 and upstream["seconds"] < NOT_WAITED, upstream
    assert neighbour["code"] == 250, neighbour  # the cap holds back the flooder only
    delivered = Counter(message_id(d.content) for d in sink.deliveries)
    assert delivered == {"upstream@vetsupply.example": 1, "neighbour@mail.example": 1}


@pytest.mark.slow
async def test_floods_filling_the_cap_leave_the_reserved_slots_to_the_upstream(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    sources = [f"127.0.0.{10 + i}" for i in range(12)]  # 12 x 20 = 240 > the 180 they share
    async with default_daemon(tmp_path, sink) as port:
        idle = await flood(port, sources, PER_CLIENT)
        try:
            latecomer = await flood(port, ["127.0.0.50"], 1)
            upstream = await asyncio.gather(
                *(deliver(port, f"upstream-{i}@vetsupply.example") for i in range(3))
            )
            open_after = await idle.still_open()
        finally:
            idle.close()
            latecomer.close()
    print(
        f"\nFLOOD | 12 addresses x {PER_CLIENT} idle connections | answers {dict(idle.answers)}"
        f" | one more outside address {dict(latecomer.answers)} | still open after the "
        f"deliveries {open_after} | upstream 127.0.0.1, 3 at once: {upstream}"
    )
    assert idle.answers == {"220": OUTSIDE_SHARE, "421 4.3.2": 240 - OUTSIDE_SHARE}, idle.answers
    assert latecomer.answers == {"421 4.3.2": 1}
    assert open_after == OUTSIDE_SHARE
    for outcome in upstream:
        assert outcome["code"] == 250 and outcome["seconds"] < NOT_WAITED, upstream
    delivered = Counter(message_id(d.content) for d in sink.deliveries)
    assert delivered == {f"upstream-{i}@vetsupply.example": 1 for i in range(3)}

"""The SMTP side under abuse: a client trickling one byte per second, connection floods past
``smtp.max_connections``, pipelining abuse, and a well-behaved client that must still get its
message through while all of that goes on.

The well-behaved client acts as a mail server would: a 421 at connect (the cap, RFC 5321
section 3.8) is a reason to try again shortly, so it retries, a bounded number of times.
Its deadline is generous (GOOD_CLIENT_DEADLINE) and only bounds the wait; the figures are
printed, never asserted as speed.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
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

MAX_CONNECTIONS = 8
COMMAND_TIMEOUT = 3.0  # idle seconds before the daemon drops a connection
GOOD_CLIENT_DEADLINE = 60.0
SLOW_BYTES = b"EHLO slow."  # ten bytes, one a second


@asynccontextmanager
async def daemon(tmp_path: Path, sink: FaultyNextHop) -> AsyncIterator[Any]:
    trained_store(tmp_path / "model.sqlite3")
    # Everything here comes from 127.0.0.1, a reserved address, so the per-client cap and
    # the reserved slots (test_floods.py) play no part; the total cap is what is tested.
    smtp = {
        "max_connections": MAX_CONNECTIONS,
        "reserved_connections": 0,
        "command_timeout": COMMAND_TIMEOUT,
    }
    settings = service_settings(tmp_path, sink.address, smtp=smtp)
    async with running_service(settings) as service:
        yield service


async def read_replies(reader: asyncio.StreamReader, count: int, timeout: float) -> list[int]:
    """Codes of the next ``count`` final reply lines (multi-line replies count once)."""
    codes: list[int] = []
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout
    while len(codes) < count:
        line = await asyncio.wait_for(reader.readline(), max(deadline - loop.time(), 0.01))
        if not line:
            break
        if line[3:4] != b"-":
            codes.append(int(line[:3]))
    return codes


async def slow_client(port: int, result: dict[str, Any]) -> None:
    reader, writer = await asyncio.open_connection(LOCAL, port)
    try:
        result["greeting"] = (await reader.readline())[:3]
        for byte in SLOW_BYTES:
            writer.write(bytes([byte]))
            await writer.drain()
            await asyncio.sleep(1.0)
        writer.write(b"\r\nQUIT\r\n")
        result["replies"] = await read_replies(reader, 2, 10)
    except (OSError, TimeoutError) as exc:
        result["error"] = repr(exc)
    finally:
        writer.close()


async def flood(port: int, connections: int, hold: float, result: dict[str, Any]) -> None:
    """Open ``connections`` at once and sit on them; count greetings and refusals."""

    async def one() -> bytes:
        try:
            reader, writer = await asyncio.open_connection(LOCAL, port)
        except OSError:
            return b"err"
        try:
            first = (await asyncio.wait_for(reader.readline(), 10))[:3]
            await asyncio.sleep(hold)
            return first
        except (OSError, TimeoutError):
            return b"err"
        finally:
            writer.close()

    for code in await asyncio.gather(*(one() for _ in range(connections))):
        result[code.decode() or "closed"] = result.get(code.decode() or "closed", 0) + 1


async def pipeliner(port: int, transactions: int, result: dict[str, Any]) -> None:
    """Every transaction in one write, message content included, never waiting for 354."""
    script = [b"EHLO pipe.mail.example\r\n"]
    for i in range(transactions):
        script += [
            f"MAIL FROM:<{SENDER}>\r\n".encode(),
            f"RCPT TO:<{RECIPIENT}>\r\n".encode(),
            b"DATA\r\n",
            f"Message-ID: <pipe-{i}@mail.example>\r\nSubject: pipelined\r\n\r\n".encode(),
            b"body\r\n.\r\n",
        ]
    script.append(b"QUIT\r\n")
    reader, writer = await asyncio.open_connection(LOCAL, port)
    try:
        await reader.readline()
        writer.write(b"".join(script))
        await writer.drain()
        codes = await read_replies(reader, 1 + 4 * transactions + 1, 120)
        result["codes"] = codes
    finally:
        writer.close()


async def recipient_storm(port: int, recipients: int, result: dict[str, Any]) -> None:
    """Thousands of RCPT and NOOP commands in one write."""
    rcpts = b"".join(f"RCPT TO:<r{i}@harbourlane.example>\r\n".encode() for i in range(recipients))
    script = b"EHLO storm.mail.example\r\n" + f"MAIL FROM:<{SENDER}>\r\n".encode() + rcpts
    script += b"NOOP\r\n" * recipients + b"RSET\r\nQUIT\r\n"
    reader, writer = await asyncio.open_connection(LOCAL, port)
    try:
        await reader.readline()
        writer.write(script)
        await writer.drain()
        result["codes"] = await read_replies(reader, 2 + 2 * recipients + 2, 120)
    finally:
        writer.close()


async def good_client(port: int, result: dict[str, Any]) -> None:
    loop = asyncio.get_running_loop()
    started = loop.time()
    raw = (
        f"From: <{SENDER}>\r\nTo: <{RECIPIENT}>\r\nSubject: vaccine order\r\n"
        "Message-ID: <good-client@vetsupply.example>\r\n\r\nArrives Tuesday.\r\n"
    ).encode()
    attempts = 0
    while loop.time() - started < GOOD_CLIENT_DEADLINE:
        attempts += 1
        client = aiosmtplib.SMTP(hostname=LOCAL, port=port, timeout=30)
        try:
            await client.connect()
            await client.sendmail(SENDER, [RECIPIENT], raw)
            await client.quit()
            result.update(delivered=True, attempts=attempts, seconds=loop.time() - started)
            return
        except (aiosmtplib.SMTPException, OSError, TimeoutError) as exc:
            result.setdefault("refusals", []).append(type(exc).__name__)
            client.close()
            await asyncio.sleep(0.25)
    result.update(delivered=False, attempts=attempts)


@pytest.mark.slow
async def test_slow_clients_floods_and_pipelining_do_not_starve_a_good_client(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    slow: dict[str, Any] = {}
    wave1: dict[str, Any] = {}
    wave2: dict[str, Any] = {}
    piped: dict[str, Any] = {}
    storm: dict[str, Any] = {}
    good: dict[str, Any] = {}
    async with daemon(tmp_path, sink) as service:
        port = service.smtp_address.port
        abuse = [
            asyncio.create_task(slow_client(port, slow)),
            asyncio.create_task(pipeliner(port, 200, piped)),
            asyncio.create_task(recipient_storm(port, 2000, storm)),
        ]
        await asyncio.sleep(0.3)
        # Past the cap: the rest of the slots, and three times the cap more, held 8 s each.
        abuse.append(asyncio.create_task(flood(port, 4 * MAX_CONNECTIONS, 8.0, wave1)))
        await asyncio.sleep(0.3)
        await good_client(port, good)
        abuse.append(asyncio.create_task(flood(port, 4 * MAX_CONNECTIONS, 2.0, wave2)))
        try:
            await asyncio.wait_for(asyncio.gather(*abuse), 180)
        finally:
            for task in abuse:
                task.cancel()
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task
        open_after = service.handler.open_connections()
    print(
        f"\nSLOW | good client: {good} | slow client: {slow} | flood waves: {wave1} {wave2} | "
        f"pipelined: {len(piped.get('codes', []))} replies | storm: {len(storm.get('codes', []))} "
        f"replies | open after: {len(open_after)}"
    )
    assert good.get("delivered"), good
    delivered = [message_id(d.content) for d in sink.deliveries]
    assert delivered.count("good-client@vetsupply.example") == 1
    # The cap held: never more greetings than slots, the rest refused with 421.
    assert wave1.get("220", 0) <= MAX_CONNECTIONS and wave1.get("421", 0) > 0, wave1
    # Pipelining: every command answered in order, every message relayed once.
    codes = piped["codes"]
    assert codes[0] == 250 and codes[-1] == 221
    assert codes[1:-1] == [250, 250, 354, 250] * 200
    assert sum(1 for m in delivered if m and m.startswith("pipe-")) == 200
    # The storm: 50 recipients (smtp.max_recipients) at most, the rest 452, all NOOPs 250.
    codes = storm["codes"]
    assert codes[:2] == [250, 250]
    rcpt = codes[2 : 2 + 2000]
    assert set(rcpt) <= {250, 452}
    assert codes[2 + 2000 : 2 + 4000] == [250] * 2000
    # The slow client was served (idle timer restarts on each byte) and left politely.
    assert slow.get("replies") in ([250, 221], [221]), slow

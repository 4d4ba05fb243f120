"""The pieces of bench/bench_relay.py that run in their own processes, and the load generator.

    python bench/relay_parts.py sink PORT_FILE          # aiosmtpd sink: 250 for every message
    python bench/relay_parts.py bare NEXT_HOP PORT_FILE # bare aiosmtpd relay to NEXT_HOP
    python bench/relay_parts.py bare NEXT_HOP PORT_FILE --wire   # DATA sent as mailweir does

The bare relay is built the way mailweir relays (daemon/relay.py, daemon/smtp.py): aiosmtpd
with ``decode_data=False`` in front, one aiosmtplib client per upstream connection kept across
its transactions, MAIL FROM at the first RCPT, each RCPT answered with the next hop's reply,
and 250 only after the next hop accepted the DATA.  It only leaves out the judging.  By
default it sends the message with aiosmtplib's ``data``, as the simplest relay would; with
``--wire`` it sends DATA the way mailweir does (``daemon/relay.py`` ``data_wire``, which skips
aiosmtplib's rewriting of line endings and leading dots when a message needs neither), so the
two relays differ by the judging alone.

Each server writes its port to PORT_FILE once it listens, and runs until SIGTERM.
"""

from __future__ import annotations

import asyncio
import signal
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import aiosmtplib
from aiosmtpd.smtp import SMTP, Envelope, Session

from mailweir.daemon.relay import data_wire

LOCAL = "127.0.0.1"
SENDER = "orders@vetsupply.example"
RECIPIENT = "maren.okafor@harbourlane.example"


class SinkHandler:
    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        return "250 2.0.0 Stored"


class RelayHandler:
    """Lock-step relay without judging; the next-hop client lives on the session."""

    def __init__(self, host: str, port: int, wire: bool = False) -> None:
        self.host, self.port = host, port
        self.wire = wire

    async def handle_RCPT(
        self, server: SMTP, session: Session, envelope: Envelope, address: str, options: list[str]
    ) -> str:
        client: aiosmtplib.SMTP | None = getattr(session, "next_hop", None)
        if client is None or not client.is_connected:
            client = aiosmtplib.SMTP(hostname=self.host, port=self.port, start_tls=False)
            await client.connect()
            session.next_hop = client  # type: ignore[attr-defined]
        if not getattr(envelope, "relay_open", False):
            answer = await client.mail(envelope.mail_from or "")
            envelope.relay_open = True  # type: ignore[attr-defined]
        answer = await client.rcpt(address)
        if answer.code < 400:
            envelope.rcpt_tos.append(address)  # a handle_RCPT hook records the recipient itself
        return f"{answer.code} {answer.message}"

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        client: aiosmtplib.SMTP = session.next_hop  # type: ignore[attr-defined]
        if not self.wire:
            answer = await client.data(envelope.original_content or b"")
            return f"{answer.code} {answer.message}"
        start = await client.execute_command(b"DATA")
        if start.code != 354 or client.protocol is None:
            return f"{start.code} {start.message}"
        client.protocol.write(data_wire(envelope.original_content or b""))
        answer = await client.protocol.read_response(timeout=60)
        return f"{answer.code} {answer.message}"

    async def handle_QUIT(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        client = getattr(session, "next_hop", None)
        if client is not None and client.is_connected:
            await client.quit()
        return "221 Bye"


async def serve(handler: object, port_file: Path) -> None:
    loop = asyncio.get_running_loop()
    server = await loop.create_server(
        lambda: SMTP(handler, decode_data=False, enable_SMTPUTF8=True, hostname="bench.example"),
        host=LOCAL,
        port=0,
    )
    port_file.write_text(str(server.sockets[0].getsockname()[1]))
    stop = asyncio.Event()
    loop.add_signal_handler(signal.SIGTERM, stop.set)
    await stop.wait()
    server.close()


# -- load generator ----------------------------------------------------------------------------


@dataclass
class Results:
    latencies: list[float] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)


async def _reply(reader: asyncio.StreamReader) -> bytes:
    """The last line of one (possibly multi-line) reply."""
    while True:
        line = await reader.readline()
        if not line:
            raise ConnectionError("server closed the connection")
        if line[3:4] != b"-":
            return line


Connection = tuple[asyncio.StreamReader, asyncio.StreamWriter]


async def _connect(port: int) -> Connection:
    reader, writer = await asyncio.open_connection(LOCAL, port)
    await _reply(reader)
    writer.write(b"EHLO load.mail.example\r\n")
    await _reply(reader)
    return reader, writer


async def _send_queue(
    connection: Connection, queue: asyncio.Queue[bytes], results: Results
) -> None:
    """A lean SMTP client (no pipelining), so the load generator costs little CPU."""
    reader, writer = connection
    while not queue.empty():
        raw = queue.get_nowait()
        started = time.perf_counter()
        for command, expect in (
            (b"MAIL FROM:<" + SENDER.encode() + b">\r\n", b"2"),
            (b"RCPT TO:<" + RECIPIENT.encode() + b">\r\n", b"2"),
            (b"DATA\r\n", b"3"),
            (raw + b".\r\n", b"2"),
        ):
            writer.write(command)
            answer = await _reply(reader)
            if not answer.startswith(expect):
                results.failures.append(answer.decode("ascii", "replace").strip())
                writer.write(b"RSET\r\n")
                await _reply(reader)
                break
        else:
            results.latencies.append(time.perf_counter() - started)


async def _quit(connection: Connection) -> None:
    reader, writer = connection
    writer.write(b"QUIT\r\n")
    await _reply(reader)
    writer.close()
    await writer.wait_closed()


class Sessions:
    """``clients`` SMTP connections to one server, kept open from one ``push`` to the next
    (bench_relay.py's interleaved rounds send slice after slice over the same connections,
    as a whole run does)."""

    def __init__(self, port: int, clients: int) -> None:
        self.port = port
        self.clients = clients
        self._open: list[Connection] = []

    async def __aenter__(self) -> Sessions:
        self._open = [await _connect(self.port) for _ in range(self.clients)]
        return self

    async def __aexit__(self, *exc: object) -> None:
        await asyncio.gather(*(_quit(connection) for connection in self._open))
        self._open = []

    async def push(self, messages: list[bytes]) -> Results:
        """Send every message once over the open connections."""
        queue: asyncio.Queue[bytes] = asyncio.Queue()
        for raw in messages:
            queue.put_nowait(raw)
        results = Results()
        await asyncio.gather(*(_send_queue(c, queue, results) for c in self._open))
        return results


async def push(port: int, messages: list[bytes], clients: int) -> Results:
    """Send every message once over ``clients`` connections; returns latencies and failures.

    Messages must end in CRLF and have no line starting with a dot (none of ours does)."""
    async with Sessions(port, clients) as sessions:
        return await sessions.push(messages)


def main(argv: list[str]) -> None:
    if argv[0] == "sink":
        asyncio.run(serve(SinkHandler(), Path(argv[1])))
    elif argv[0] == "bare":
        host, _, port = argv[1].rpartition(":")
        wire = argv[3:] == ["--wire"]
        asyncio.run(serve(RelayHandler(host, int(port), wire), Path(argv[2])))
    else:
        raise SystemExit(__doc__)


if __name__ == "__main__":
    main(sys.argv[1:])

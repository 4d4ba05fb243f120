"""Helpers for end-to-end SMTP tests: a real next-hop sink, a running mailweir, a sender.

Everything listens on 127.0.0.1, on ports the OS picks, inside the test's own event loop.
"""

from __future__ import annotations

import asyncio
import dataclasses
import smtplib
import socket
from collections.abc import AsyncIterator, Callable, Sequence
from contextlib import asynccontextmanager
from dataclasses import dataclass, field, replace
from typing import Any

from aiosmtpd.smtp import SMTP, Envelope, Session

from mailweir.daemon.settings import (
    HostPort,
    NextHopSettings,
    PolicySettings,
    Settings,
    SmtpSettings,
)
from mailweir.daemon.smtp import FilterHandler
from mailweir.daemon.smtp_server import Connections, create_smtp_server

LOCAL = "127.0.0.1"
SINK_LIMIT = 128 * 1024 * 1024


# -- the next hop -------------------------------------------------------------------------------


@dataclass
class Delivery:
    mail_from: str
    mail_options: list[str]
    rcpt_tos: list[str]
    content: bytes
    xforward: list[str] = field(default_factory=list)  # XFORWARD arguments before its MAIL


@dataclass
class SinkBehaviour:
    """What the sink does; tests change it between messages."""

    refuse: dict[str, str] = field(default_factory=dict)  # address -> RCPT reply
    data_reply: str | None = None  # e.g. "451 4.3.0 ..." or "554 5.6.0 ..."
    hang_at_data: bool = False
    delay_at_data: float = 0.0  # seconds before answering the end of DATA
    mail_reply: str | None = None
    drop_at_rcpt: set[str] = field(default_factory=set)  # answer 421 and hang up
    offer_xforward: str | None = None  # e.g. "NAME ADDR PROTO HELO": listed in EHLO
    xforward_reply: str = "250 2.0.0 Ok"


class SinkSMTP(SMTP):
    line_length_limit = SINK_LIMIT  # a next hop that takes long lines, like a real MTA

    def __init__(self, sink: NextHop, **kwargs: Any) -> None:
        super().__init__(sink, **kwargs)
        self.sink = sink

    xforward_args: list[str]  # since the last transaction ended

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        self.xforward_args = []
        self.sink.protocols.add(self)
        self.sink.connections += 1
        super().connection_made(transport)

    def connection_lost(self, error: Exception | None) -> None:
        self.sink.protocols.discard(self)
        super().connection_lost(error)

    async def smtp_XFORWARD(self, arg: str | None) -> None:
        """As Postfix's XFORWARD (only when offered): the attributes hold until the end of
        the next transaction."""
        if self.sink.behaviour.offer_xforward is None:
            await self.push("500 5.5.2 Error: command not recognized")
            return
        self.xforward_args.append(arg or "")
        await self.push(self.sink.behaviour.xforward_reply)


class NextHop:
    """A real aiosmtpd server standing in for the organisation's mail server."""

    def __init__(self) -> None:
        self.deliveries: list[Delivery] = []
        self.behaviour = SinkBehaviour()
        self.protocols: set[SinkSMTP] = set()
        self.connections = 0
        self.rsets = 0
        self.address = HostPort(LOCAL, 0)
        self._server: asyncio.Server | None = None

    async def start(self) -> None:
        loop = asyncio.get_running_loop()

        def protocol() -> SinkSMTP:
            return SinkSMTP(
                self,
                data_size_limit=SINK_LIMIT,
                enable_SMTPUTF8=True,
                decode_data=False,
                hostname="mx.harbourlane.example",
                timeout=30,
                loop=loop,
            )

        self._server = await loop.create_server(protocol, host=LOCAL, port=0)
        self.address = HostPort(LOCAL, self._server.sockets[0].getsockname()[1])

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            for proto in list(self.protocols):
                if proto.transport is not None:
                    proto.transport.close()
            await self._server.wait_closed()
            await asyncio.sleep(0)

    async def handle_MAIL(
        self, server: SMTP, session: Session, envelope: Envelope, address: str, options: list[str]
    ) -> str:
        if self.behaviour.mail_reply:
            return self.behaviour.mail_reply
        envelope.mail_from = address
        envelope.mail_options.extend(options)
        return "250 2.1.0 Sender ok"

    async def handle_RCPT(
        self, server: SMTP, session: Session, envelope: Envelope, address: str, options: list[str]
    ) -> str:
        if address in self.behaviour.drop_at_rcpt:
            assert server.transport is not None
            asyncio.get_running_loop().call_later(0.05, server.transport.close)
            return "421 4.3.2 Service shutting down"
        if address in self.behaviour.refuse:
            return self.behaviour.refuse[address]
        envelope.rcpt_tos.append(address)
        return "250 2.1.5 Recipient ok"

    async def handle_EHLO(
        self,
        server: SMTP,
        session: Session,
        envelope: Envelope,
        hostname: str,
        responses: list[str],
    ) -> list[str]:
        session.host_name = hostname
        offered = self.behaviour.offer_xforward
        if offered is None:
            return responses
        return [*responses[:-1], f"250-XFORWARD {offered}", responses[-1]]

    async def handle_RSET(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        if isinstance(server, SinkSMTP):
            server.xforward_args = []
        self.rsets += 1
        return "250 2.0.0 Reset"

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        if self.behaviour.hang_at_data:
            await asyncio.Event().wait()  # until our client gives up and the connection drops
        await asyncio.sleep(self.behaviour.delay_at_data)
        if self.behaviour.data_reply:
            return self.behaviour.data_reply
        told: list[str] = []
        if isinstance(server, SinkSMTP):
            told, server.xforward_args = server.xforward_args, []
        self.deliveries.append(
            Delivery(
                envelope.mail_from or "",
                list(envelope.mail_options),
                list(envelope.rcpt_tos),
                envelope.original_content or b"",
                told,
            )
        )
        return f"250 2.0.0 Queued as Q{len(self.deliveries)}"


async def wait_until(condition: Callable[[], object], rounds: int = 2000) -> None:
    """Poll *condition* every 5 ms, at most *rounds* times (10 s by default)."""
    for _ in range(rounds):
        if condition():
            return
        await asyncio.sleep(0.005)
    raise AssertionError("condition never became true")


def free_port() -> int:
    """A port nothing listens on (bound once by us, then released)."""
    with socket.socket() as probe:
        probe.bind((LOCAL, 0))
        return int(probe.getsockname()[1])


@asynccontextmanager
async def silent_server() -> AsyncIterator[HostPort]:
    """Accepts TCP connections and never says a word (a next hop that hangs at the greeting)."""
    writers: list[asyncio.StreamWriter] = []

    async def accept(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        writers.append(writer)

    server = await asyncio.start_server(accept, LOCAL, 0)
    try:
        yield HostPort(LOCAL, server.sockets[0].getsockname()[1])
    finally:
        server.close()
        for writer in writers:
            writer.close()
        await server.wait_closed()


# -- judging and logging fakes ------------------------------------------------------------------


@dataclass(frozen=True)
class Judged:
    """Same fields as mailweir.daemon.judge.Judgement."""

    tracking_id: str
    band: str
    score: float | None
    evidence: tuple[tuple[str, float], ...] = ()
    token_hashes: Any = None


SPAM = Judged("0123456789abcdef", "spam", 0.99871, (("cheap", 3.2), ("invoice", -1.5)))
HAM = Judged("0123456789abcdeg", "ham", 0.01, (("invoice", -2.0),))


class FakeJudge:
    """Returns a fixed judgement and remembers what it was shown."""

    def __init__(self, judgement: Judged = HAM, error: Exception | None = None) -> None:
        self.judgement = judgement
        self.error = error
        self.seen: list[bytes] = []

    async def judge(self, raw: bytes) -> Judged:
        self.seen.append(raw)
        if self.error is not None:
            raise self.error
        return self.judgement


class FakeVerdictLog:
    def __init__(self) -> None:
        self.records: list[Any] = []

    def add(self, record: Any) -> None:
        self.records.append(record)


# -- mailweir itself ---------------------------------------------------------------------------


def daemon_settings(next_hop: HostPort, *, relay_timeout: float = 10.0, **policy: Any) -> Settings:
    """Enforce mode unless told otherwise.  Relay timeouts are generous so a busy test machine
    never trips them; tests of a slow next hop pass a small ``relay_timeout``."""
    policy.setdefault("mode", "enforce")
    return Settings(
        smtp=SmtpSettings(
            listen=HostPort(LOCAL, 0),
            hostname="filter.harbourlane.example",
            max_message_bytes=8 * 1024 * 1024,
            max_recipients=50,
            command_timeout=10.0,
        ),
        next_hop=NextHopSettings(
            address=next_hop,
            connect_timeout=relay_timeout,
            command_timeout=relay_timeout,
            data_timeout=relay_timeout,
            helo_name="filter.harbourlane.example",
        ),
        policy=PolicySettings(**policy),
    )


@dataclass
class RunningDaemon:
    settings: Settings
    port: int
    judge: FakeJudge
    verdict_log: FakeVerdictLog
    connections: Connections


@asynccontextmanager
async def running_daemon(
    settings: Settings,
    judge: FakeJudge | None = None,
    verdict_log: FakeVerdictLog | None = None,
    metrics: Any = None,
) -> AsyncIterator[RunningDaemon]:
    """mailweir's SMTP side on a free port of 127.0.0.1, in this event loop."""
    judge = judge or FakeJudge()
    verdict_log = verdict_log or FakeVerdictLog()
    handler = FilterHandler(settings, judge, verdict_log, metrics=metrics)
    connections = Connections(settings.smtp.max_connections)
    server = await create_smtp_server(settings, handler, connections=connections)
    port = server.sockets[0].getsockname()[1]
    bound = replace(settings, smtp=replace(settings.smtp, listen=HostPort(LOCAL, port)))
    try:
        yield RunningDaemon(bound, port, judge, verdict_log, connections)
    finally:
        server.close()
        connections.close_all()
        await server.wait_closed()
        await asyncio.sleep(0)


# -- the sending side: Python's smtplib in a thread ---------------------------------------------


@dataclass
class Sent:
    mail: tuple[int, bytes]
    rcpt: list[tuple[int, bytes]]
    data: tuple[int, bytes] | None


def _send_sync(
    port: int,
    sender: str,
    recipients: Sequence[str],
    message: bytes,
    mail_options: Sequence[str],
) -> Sent:
    with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
        client.ehlo()
        mail = client.mail(sender, list(mail_options))
        rcpt = [client.rcpt(address) for address in recipients]
        data: tuple[int, bytes] | None = None
        if any(code == 250 for code, _ in rcpt):
            try:
                data = client.data(message)
            except smtplib.SMTPDataError as exc:
                data = (exc.smtp_code, exc.smtp_error)
        else:
            client.rset()
        return Sent(mail, rcpt, data)


async def send(
    port: int,
    message: bytes,
    recipients: Sequence[str] = ("maren.okafor@harbourlane.example",),
    sender: str = "orders@vetsupply.example",
    mail_options: Sequence[str] = (),
) -> Sent:
    """One transaction with smtplib; returns every reply, per recipient."""
    return await asyncio.to_thread(_send_sync, port, sender, recipients, message, mail_options)


def message(body: bytes = b"The vaccine order arrives on Tuesday.\r\n", **fields: str) -> bytes:
    """A small message from a supplier to the practice, CRLF line endings."""
    head = {
        "From": "Orders <orders@vetsupply.example>",
        "To": "Dr. Maren Okafor <maren.okafor@harbourlane.example>",
        "Subject": "Your order 4411",
        "Message-ID": "<4411@vetsupply.example>",
        **{name.replace("_", "-"): value for name, value in fields.items()},
    }
    lines = "".join(f"{name}: {value}\r\n" for name, value in head.items())
    return lines.encode("utf-8") + b"\r\n" + body


@asynccontextmanager
async def running_service(settings: Settings) -> AsyncIterator[HostPort]:
    """The whole daemon (daemon/service.py: store, judge, verdict log, SMTP side) on a free
    port; yields the SMTP address it bound."""
    from mailweir.daemon.service import Service

    # The HTTP side binds too: a free port, so tests never collide with each other or a demo.
    http = dataclasses.replace(settings.http, listen=HostPort("127.0.0.1", 0))
    service = Service(dataclasses.replace(settings, http=http))
    await service.startup()
    try:
        yield service.smtp_address
    finally:
        await service.shutdown(grace=5)

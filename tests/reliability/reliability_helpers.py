"""Helpers for the reliability tests: an upstream that keeps what it was not given 250 for,
a next hop that can misbehave per message, a real daemon, and the loss ledger.

Everything listens on 127.0.0.1, on ports the OS picks.  The upstream is aiosmtplib (a
maintained client), one connection per worker, reconnecting after any failure.
"""

from __future__ import annotations

import asyncio
import dataclasses
import random
import re
import sqlite3
from collections import Counter
from collections.abc import AsyncIterator, Callable, Sequence
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiosmtplib
from aiosmtpd.smtp import SMTP, Envelope, Session
from smtp_helpers import NextHop

from mailweir.daemon import scenario
from mailweir.daemon.feedback import hashes_of
from mailweir.daemon.service import Service
from mailweir.daemon.settings import (
    HostPort,
    HttpSettings,
    LogSettings,
    ModelSettings,
    NextHopSettings,
    PolicySettings,
    Settings,
    SmtpSettings,
)
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore

LOCAL = "127.0.0.1"
SENDER = "orders@vetsupply.example"
RECIPIENT = "maren.okafor@harbourlane.example"
_MESSAGE_ID = re.compile(rb"^Message-ID:\s*<([^>]+)>", re.IGNORECASE | re.MULTILINE)

# -- messages ------------------------------------------------------------------------------------


def load_message(index: int, rng: random.Random) -> bytes:
    """A small supplier or customer message with a unique Message-ID, CRLF line endings.

    Bodies vary in length and wording so the scorer sees different token sets; a few carry
    8-bit text and a leading-dot line (SMTP transparency, RFC 5321 section 4.5.2)."""
    topics = ["vaccine order", f"invoice 20-{index}", "appointment for Bella", "lab results"]
    words = ["kennel", "sutures", "dispatch", "payment", "cheap", "winner", "dose", "clinic"]
    body_lines = [
        " ".join(rng.choices(words, k=rng.randint(3, 12))) for _ in range(rng.randint(1, 40))
    ]
    if index % 7 == 0:
        body_lines.append(".a line that starts with a dot")
    if index % 11 == 0:
        body_lines.append("Grüße aus der Praxis, Ærø")
    head = (
        f"From: Orders <{SENDER}>\r\n"
        f"To: Dr. Maren Okafor <{RECIPIENT}>\r\n"
        f"Subject: {rng.choice(topics)}\r\n"
        f"Message-ID: <load-{index}@mail.example>\r\n"
        "Content-Type: text/plain; charset=utf-8\r\n"
    )
    return (head + "\r\n" + "\r\n".join(body_lines) + "\r\n").encode("utf-8")


def message_id(raw: bytes) -> str | None:
    match = _MESSAGE_ID.search(raw)
    return match.group(1).decode("ascii", "replace") if match else None


def without_own_fields(raw: bytes) -> bytes:
    """``raw`` without header fields named Mailweir-* (and their continuation lines).

    Written independently of daemon/headers.py on purpose: it is the oracle for "byte for
    byte apart from our header fields" (RFC 5322 section 2.2.3: a line starting with space
    or tab continues the field above)."""
    end = raw.find(b"\r\n\r\n")
    head, rest = (raw, b"") if end < 0 else (raw[: end + 2], raw[end + 2 :])
    kept: list[bytes] = []
    dropping = False
    for line in head.split(b"\r\n")[:-1]:
        if not line.startswith((b" ", b"\t")):
            dropping = line.lower().startswith(b"mailweir-")
        if not dropping:
            kept.append(line + b"\r\n")
    return b"".join(kept) + rest


# -- the upstream ------------------------------------------------------------------------------


@dataclass
class Ledger:
    """What the upstream knows: each message's last answer, and what it still holds."""

    answers: dict[str, int] = field(default_factory=dict)  # message id -> last code (0: none)
    replies: Counter[int] = field(default_factory=Counter)  # every answer, by code
    retried: set[str] = field(default_factory=set)  # sent again after a non-250 answer
    attempts: int = 0
    worst_seconds: float = 0.0

    def accepted(self) -> set[str]:
        return {key for key, code in self.answers.items() if code == 250}

    def held(self) -> set[str]:
        """Not accepted and not refused for good: the upstream still has them to retry."""
        return {key for key, code in self.answers.items() if code != 250 and not 500 <= code < 600}

    def bounced(self) -> set[str]:
        return {key for key, code in self.answers.items() if 500 <= code < 600}


async def _submit(client: aiosmtplib.SMTP, raw: bytes, timeout: float) -> int:
    """One transaction on an open connection; the final code, raising on a lost connection."""
    answer = await client.execute_command(
        b"MAIL", b"FROM:<" + SENDER.encode() + b">", timeout=timeout
    )
    if answer.code != 250:
        return answer.code
    answer = await client.execute_command(
        b"RCPT", b"TO:<" + RECIPIENT.encode() + b">", timeout=timeout
    )
    if answer.code != 250:
        await client.execute_command(b"RSET", timeout=timeout)
        return answer.code
    try:
        answer = await client.data(raw, timeout=timeout)
    except aiosmtplib.SMTPDataError as exc:
        return exc.code
    return answer.code


async def upstream(
    port: int,
    messages: dict[str, bytes],
    ledger: Ledger,
    *,
    clients: int,
    timeout: float = 60.0,
    between: Callable[[int], Any] | None = None,
) -> None:
    """Send every message once from ``clients`` concurrent connections.

    A connection that breaks counts as no answer (code 0: the upstream keeps the message)
    and is opened afresh for the next message.  ``between(n)`` runs after each n-th send."""
    queue: asyncio.Queue[str] = asyncio.Queue()
    for key in messages:
        queue.put_nowait(key)

    async def worker() -> None:
        client: aiosmtplib.SMTP | None = None
        loop = asyncio.get_running_loop()
        while not queue.empty():
            key = queue.get_nowait()
            started = loop.time()
            try:
                if client is None or not client.is_connected:
                    client = aiosmtplib.SMTP(
                        hostname=LOCAL, port=port, local_hostname="mx.mail.example", timeout=timeout
                    )
                    await client.connect()
                code = await _submit(client, messages[key], timeout)
            except (aiosmtplib.SMTPException, OSError, TimeoutError):
                code = 0
                if client is not None:
                    client.close()
                client = None
            if key in ledger.answers:
                ledger.retried.add(key)
            ledger.answers[key] = code
            ledger.replies[code] += 1
            ledger.attempts += 1
            ledger.worst_seconds = max(ledger.worst_seconds, loop.time() - started)
            if between is not None:
                await between(ledger.attempts)
        if client is not None and client.is_connected:
            try:
                await client.quit(timeout=5)
            except (aiosmtplib.SMTPException, OSError, TimeoutError):
                client.close()

    await asyncio.gather(*(worker() for _ in range(clients)))


# -- the next hop ------------------------------------------------------------------------------


class FaultyNextHop(NextHop):
    """The recording sink, with a fault chosen per DATA by ``fault(content)``.

    A fault is None (accept), a reply text ("451 ...", "554 ..."), "reset" (close the
    connection before answering the end of DATA) or "stall" (never answer).
    """

    def __init__(self) -> None:
        super().__init__()
        self.fault: Callable[[bytes], str | None] = lambda content: None
        self.mail_fault: Callable[[], str | None] = lambda: None  # a reply to MAIL FROM
        self.faults: Counter[str] = Counter()

    async def handle_MAIL(
        self, server: SMTP, session: Session, envelope: Envelope, address: str, options: list[str]
    ) -> str:
        fault = self.mail_fault()
        if fault is None:
            return await super().handle_MAIL(server, session, envelope, address, options)
        self.faults["MAIL " + fault.split(" ")[0]] += 1
        if fault.startswith("421"):
            assert server.transport is not None
            asyncio.get_running_loop().call_later(0.01, server.transport.close)
        return fault

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        fault = self.fault(envelope.original_content or b"")
        if fault is None:
            return await super().handle_DATA(server, session, envelope)
        self.faults[fault.split(" ")[0]] += 1
        if fault == "reset":
            assert server.transport is not None
            server.transport.abort()  # RST, as a crashing next hop would leave it
            await asyncio.Event().wait()
        if fault == "stall":
            await asyncio.Event().wait()
        return fault

    def copies(self) -> Counter[str]:
        return Counter(message_id(d.content) or "?" for d in self.deliveries)


def check_nothing_lost(messages: dict[str, bytes], ledger: Ledger, sink: NextHop) -> dict[str, int]:
    """The zero-loss oracle; returns the figures for the report.

    Every message the upstream got 250 for arrived exactly once, byte for byte apart from our
    header fields; every other message is held by the upstream (4xx, no answer) or was
    refused for good (5xx, the upstream bounces it to its sender: nobody loses track)."""
    copies = Counter(message_id(d.content) or "?" for d in sink.deliveries)
    delivered = {message_id(d.content): d.content for d in sink.deliveries}
    lost = [key for key in ledger.accepted() if copies[key] == 0]
    # Two copies of a message sent once with one 250 would be our bug; a message retried
    # after a 4xx or a lost connection may legitimately arrive twice (below).
    doubled = [key for key in ledger.accepted() - ledger.retried if copies[key] > 1]
    altered = [
        key
        for key in ledger.accepted()
        if key in delivered and without_own_fields(delivered[key]) != messages[key]
    ]
    unanswered = [key for key in messages if key not in ledger.answers]
    assert not lost, f"accepted but never delivered: {lost[:5]}"
    assert not doubled, f"accepted and delivered twice: {doubled[:5]}"
    assert not altered, f"delivered with changed bytes: {altered[:5]}"
    assert not unanswered, f"never sent: {unanswered[:5]}"
    return {
        "sent": len(messages),
        "accepted": len(ledger.accepted()),
        "held": len(ledger.held()),
        "bounced": len(ledger.bounced()),
        "lost": len(lost),
        # A copy the next hop kept although the upstream never heard 250 (the connection
        # broke after the next hop accepted): the upstream's retry duplicates it, the
        # RFC 5321 section 6.1 trade-off of never losing mail.  Counted, not lost.
        "duplicates_on_retry": sum(1 for key in ledger.held() if copies[key] > 0)
        + sum(1 for key in ledger.accepted() & ledger.retried if copies[key] > 1),
    }


# -- a real daemon ---------------------------------------------------------------------------


def trained_store(path: Path, per_class: int = 30) -> None:
    """A model database trained on the scenario's own mail, so messages get real verdicts."""
    store = ModelStore.open(str(path))
    try:
        items = []
        for item in scenario.training_set(per_class):
            hashes = hashes_of(item.raw, DEFAULT_OPTIONS)
            label = HAM if item.label == "ham" else SPAM
            items.append((hashes, label, message_digest(hashes), "import"))
        store.train_many(items)
    finally:
        store.close()


def service_settings(
    tmp_path: Path,
    next_hop: HostPort,
    *,
    relay_timeout: float = 10.0,
    smtp: dict[str, Any] | None = None,
    **policy: Any,
) -> Settings:
    policy = {"mode": "enforce", "min_trained": 5, "ham_action": "tag", **policy}
    smtp_options = {
        "listen": HostPort(LOCAL, 0),
        "hostname": "filter.harbourlane.example",
        "max_message_bytes": 32 * 1024 * 1024,
        "command_timeout": 30.0,
        **(smtp or {}),
    }
    return Settings(
        state_dir=tmp_path / "state",
        smtp=SmtpSettings(**smtp_options),
        next_hop=NextHopSettings(
            address=next_hop,
            connect_timeout=relay_timeout,
            command_timeout=relay_timeout,
            data_timeout=relay_timeout,
            helo_name="filter.harbourlane.example",
        ),
        policy=PolicySettings(**policy),
        model=ModelSettings(database=str(tmp_path / "model.sqlite3"), staleness_seconds=0.5),
        http=HttpSettings(listen=HostPort(LOCAL, 0)),
        log=LogSettings(verdict_batch_seconds=0.1),
    )


@asynccontextmanager
async def running_service(settings: Settings) -> AsyncIterator[Service]:
    """The whole daemon (store, process pool, verdict log, SMTP and HTTP sides)."""
    service = Service(settings)
    await service.startup()
    try:
        yield service
    finally:
        await service.shutdown(grace=10)


def bound_port(service: Service) -> int:
    return service.smtp_address.port


def verdict_rows(database: Path) -> int:
    with sqlite3.connect(database) as conn:
        return int(conn.execute("SELECT count(*) FROM weir_verdict").fetchone()[0])


MODEL_TABLES = ("weir_token", "weir_class_total", "weir_ledger", "weir_meta")


def model_dump(database: Path, tables: Sequence[str] = MODEL_TABLES) -> dict[str, list[Any]]:
    """Every row of the model's tables, sorted: the before/after oracle for "unchanged"."""
    with sqlite3.connect(database) as conn:
        return {t: sorted(conn.execute(f"SELECT * FROM {t}").fetchall()) for t in tables}


def with_settings(settings: Settings, **sections: Any) -> Settings:
    """``settings`` with some fields of some sections replaced: smtp={"max_connections": 4}."""
    changes = {
        name: dataclasses.replace(getattr(settings, name), **values)
        for name, values in sections.items()
    }
    return dataclasses.replace(settings, **changes)

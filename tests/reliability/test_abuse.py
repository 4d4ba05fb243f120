"""Model poisoning and abuse: nobody outside steers the model or forges a verdict.

A daemon with the feedback intake in front (FeedbackGate -> FilterHandler, real Judge,
ModelStore on SQLite, VerdictLog, Metrics, and the HTTP side behind a bearer token) receives
feedback from an untrusted network, forged Mailweir-* fields, broken and oversized HTTP
requests and SQL-shaped strings in every field it takes.  Each is refused or neutralised,
counted in /metrics (read back with prometheus_client's own parser), and the model's tables
are row for row what they were before (the "unchanged" oracle, reliability_helpers.model_dump).
"""

from __future__ import annotations

import asyncio
import dataclasses
import json
import sqlite3
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from hostile_messages import fixed_messages
from prometheus_client.parser import text_string_to_metric_families
from reliability_helpers import (
    LOCAL,
    FaultyNextHop,
    message_id,
    model_dump,
    service_settings,
    trained_store,
    verdict_rows,
)
from smtp_helpers import send
from test_forwarded import as_attachment

from mailweir.daemon import feedback as feedback_module
from mailweir.daemon.feedback import FeedbackGate, FeedbackIntake
from mailweir.daemon.http_side import HttpSide
from mailweir.daemon.judge import Judge
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.settings import FeedbackSettings
from mailweir.daemon.smtp import FilterHandler
from mailweir.daemon.smtp_server import create_smtp_server
from mailweir.daemon.verdict_log import VerdictLog
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.store import ModelStore
from mailweir.store import engine as store_engine

TOKEN = "harbour-lane-feedback-3f9c1e"
SPAM_ADDRESS = "report-spam@harbourlane.example"
HAM_ADDRESS = "report-wanted@harbourlane.example"
MAX_BODY = 64 * 1024
SQL = [
    "'; DROP TABLE weir_token; --",
    "1' OR '1'='1",
    '"); DELETE FROM weir_class_total; --',
    "x' UNION SELECT hash, ham, spam FROM weir_token --",
    "Robert'); UPDATE weir_token SET spam = spam + 1000; --",
]


@dataclass
class Daemon:
    port: int
    http: str
    database: Path
    metrics: Metrics
    judge: Judge
    verdict_log: VerdictLog

    def sample(self, name: str, **labels: str) -> float:
        for family in text_string_to_metric_families(self.metrics.render().decode()):
            for sample in family.samples:
                if sample.name == name and sample.labels == labels:
                    return float(sample.value)
        return 0.0


@asynccontextmanager
async def daemon(
    tmp_path: Path, sink: FaultyNextHop, trusted: tuple[str, ...]
) -> AsyncIterator[Daemon]:
    database = tmp_path / "model.sqlite3"
    trained_store(database)
    base = service_settings(tmp_path, sink.address)
    feedback = FeedbackSettings(
        spam_address=SPAM_ADDRESS, ham_address=HAM_ADDRESS, trusted_networks=trusted
    )
    settings = dataclasses.replace(base, feedback=feedback)
    store = ModelStore.open(str(database), staleness_seconds=0.0)
    metrics = Metrics()
    judge = Judge(store, settings)
    verdict_log = VerdictLog(store, batch_seconds=0.05)
    await verdict_log.start()
    intake = FeedbackIntake(store, feedback, judge.options, metrics, verdict_log=verdict_log)
    handler = FilterHandler(settings, judge, verdict_log, metrics=metrics)
    server = await create_smtp_server(settings, FeedbackGate(handler, intake))
    http = HttpSide(
        metrics,
        token=TOKEN,
        feedback=intake,
        page=_no_page,
        ready_checks={},
        max_body_bytes=MAX_BODY,
    )
    await http.start(LOCAL, 0)
    try:
        port = server.sockets[0].getsockname()[1]
        yield Daemon(port, f"http://{LOCAL}:{http.port}", database, metrics, judge, verdict_log)
    finally:
        await http.stop()
        server.close()
        await server.wait_closed()
        await verdict_log.close()
        judge.close()
        store.close()


async def _no_page() -> str:
    return "<p>status</p>"


def message(subject: str = "Your order 4411", **extra: str) -> bytes:
    head = {
        "From": "Orders <orders@vetsupply.example>",
        "To": "Dr. Maren Okafor <maren.okafor@harbourlane.example>",
        "Subject": subject,
        "Message-ID": "<abuse-4411@vetsupply.example>",
        **extra,
    }
    return ("".join(f"{k}: {v}\r\n" for k, v in head.items()) + "\r\nCheap winner!\r\n").encode()


# -- feedback by mail from outside ---------------------------------------------------------------


async def test_abuse_untrusted_feedback_refused_counted_model_unchanged(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    # 127.0.0.1 is outside the trusted network (TEST-NET-1, RFC 5737).
    async with daemon(tmp_path, sink, ("192.0.2.0/24",)) as running:
        before = model_dump(running.database)
        replies = []
        for address in (SPAM_ADDRESS, HAM_ADDRESS, SPAM_ADDRESS.upper()):
            for _ in range(3):
                sent = await send(running.port, message(), [address])
                replies.append(sent.rcpt[0][0])
        refused = running.sample("mailweir_feedback_refused_total", reason="untrusted")
        trained = sum(
            running.sample("mailweir_feedback_total", kind=k)
            for k in ("false_positive", "false_negative", "confirmation")
        )
    after = model_dump(running.database)
    assert replies == [550] * 9
    assert refused == 9
    assert trained == 0
    assert after == before
    assert not sink.deliveries  # feedback is consumed, never relayed
    print(
        f"\nABUSE | untrusted feedback by mail | 9 sent | 9 refused (550) | counted {refused:.0f}"
    )


# -- forged fields and SQL-shaped strings over SMTP ---------------------------------------------


async def test_abuse_forged_fields_and_sql_strings_over_smtp_neutralised(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    forged = fixed_messages()["forged-verdict"]
    async with daemon(tmp_path, sink, ("192.0.2.0/24",)) as running:
        before = model_dump(running.database)
        codes = [(await send(running.port, forged)).data]
        for i, text in enumerate(SQL):
            raw = message(
                subject=text, Message_ID=f"<sql-{i}@mail.example>", Comments=text
            ).replace(b"Message-ID: <abuse-4411@vetsupply.example>\r\n", b"")
            raw = raw.replace(b"Message_ID", b"Message-ID")
            local = text.replace('"', "").replace(" ", "")
            sent = await send(
                running.port,
                raw,
                recipients=[f'"{local}"@harbourlane.example'],
                sender=f'"{local}"@mail.example',
            )
            codes.append(sent.data)
        await running.verdict_log.flush()
        rows = verdict_rows(running.database)
        after = model_dump(running.database)
    assert [c[0] if c else None for c in codes] == [250] * (1 + len(SQL))
    assert after == before
    assert rows == 1 + len(SQL)
    # The forged fields are gone; the one verdict on top is ours, with our id.
    delivered = next(
        d.content for d in sink.deliveries if message_id(d.content) == message_id(forged)
    )
    head = delivered.split(b"\r\n\r\n", 1)[0].lower()
    assert head.count(b"mailweir-verdict:") == 1
    assert b"0.0001" not in head and b"0000000000000000" not in head and b"trusted" not in head
    # The SQL-shaped envelopes reached the next hop as given.
    relayed = {d.mail_from for d in sink.deliveries}
    assert f'"{SQL[0].replace(" ", "")}"@mail.example' in relayed
    print(
        f"\nABUSE | forged fields + SQL in envelope/headers | {1 + len(SQL)} sent | "
        "all 250, forged fields stripped, model unchanged"
    )


# -- the HTTP side ------------------------------------------------------------------------------

AUTH = {"Authorization": f"Bearer {TOKEN}"}
JSON = {"Content-Type": "application/json"}


def http_abuse() -> list[tuple[str, dict[str, str], bytes, int, str]]:
    """(name, headers, body, expected status, metric reason)"""
    good = json.dumps({"tracking_id": "0123456789abcdef", "kind": "spam"}).encode()
    cases: list[tuple[str, dict[str, str], bytes, int, str]] = [
        ("no token", JSON, good, 401, "unauthorized"),
        ("wrong token", {**JSON, "Authorization": "Bearer guess"}, good, 401, "unauthorized"),
        ("basic scheme", {**JSON, "Authorization": "Basic " + TOKEN}, good, 401, "unauthorized"),
        ("empty bearer", {**JSON, "Authorization": "Bearer "}, good, 401, "unauthorized"),
        ("sql token", {**JSON, "Authorization": "Bearer ' OR '1'='1"}, good, 401, "unauthorized"),
        (
            "token prefix",
            {**JSON, "Authorization": f"Bearer {TOKEN[:-1]}"},
            good,
            401,
            "unauthorized",
        ),
        ("oversized", {**AUTH, **JSON}, b"{" + b" " * (2 * MAX_BODY) + b"}", 413, "invalid"),
        ("malformed json", {**AUTH, **JSON}, b'{"tracking_id": ', 400, "invalid"),
        ("not utf-8", {**AUTH, **JSON}, b'{"kind": "\xff\xfe"}', 400, "invalid"),
        ("json array", {**AUTH, **JSON}, b"[1, 2, 3]", 400, "invalid"),
        ("json bomb", {**AUTH, **JSON}, b"[" * 30_000 + b"]" * 30_000, 400, "invalid"),
        (
            "unknown field",
            {**AUTH, **JSON},
            b'{"tracking_id": "a", "kind": "spam", "sql": 1}',
            400,
            "invalid",
        ),
        ("wrong content type", {**AUTH, "Content-Type": "text/plain"}, good, 400, "invalid"),
        ("empty rfc822", {**AUTH, "Content-Type": "message/rfc822"}, b"  ", 400, "invalid"),
    ]
    for text in SQL:
        body = json.dumps({"tracking_id": text, "kind": "spam"}).encode()
        cases.append((f"sql id {text[:12]}", {**AUTH, **JSON}, body, 400, "invalid"))
        body = json.dumps({"tracking_id": "0123456789abcdef", "kind": text}).encode()
        cases.append((f"sql kind {text[:12]}", {**AUTH, **JSON}, body, 400, "invalid"))
    # Shaped like an id, so it reaches the store: found nowhere, nothing trained.
    body = json.dumps({"tracking_id": "DROP_TABLE_weir_token--", "kind": "ham"}).encode()
    cases.append(("id-shaped sql", {**AUTH, **JSON}, body, 404, "no_original"))
    return cases


async def test_abuse_http_requests_refused_counted_model_unchanged(
    tmp_path: Path, sink: FaultyNextHop
) -> None:
    cases = http_abuse()
    async with daemon(tmp_path, sink, ("127.0.0.0/8",)) as running:
        before = model_dump(running.database)
        got: list[tuple[str, int, Any]] = []
        async with aiohttp.ClientSession() as client:
            for name, headers, body, _, _ in cases:
                async with client.post(f"{running.http}/feedback", data=body, headers=headers) as r:
                    got.append((name, r.status, await r.json(content_type=None)))
        counted = {
            reason: running.sample("mailweir_feedback_refused_total", reason=reason)
            for reason in ("unauthorized", "invalid", "no_original")
        }
    after = model_dump(running.database)
    assert [(n, s) for n, s, _ in got] == [(c[0], c[3]) for c in cases]
    assert all("error" in body or "status" in body for _, _, body in got)
    expected = {reason: sum(1 for c in cases if c[4] == reason) for reason in counted}
    assert counted == expected
    assert after == before
    print(
        f"\nABUSE | HTTP | {len(cases)} requests | "
        f"statuses {sorted({s for _, s, _ in got})} | counted {counted}"
    )


# -- a correction while the database is locked -------------------------------------------------


async def test_abuse_feedback_while_database_locked_is_deferred_not_lost(
    tmp_path: Path, sink: FaultyNextHop, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Another process holds SQLite's write lock: the correction is answered 451 (the mail
    server keeps it and retries) within a bounded time, nothing changes; after the lock is
    gone the retry trains it once, and a second retry changes nothing."""
    pragmas = tuple(
        (name, "100" if name == "busy_timeout" else value)
        for name, value in store_engine.SQLITE_PRAGMAS
    )
    monkeypatch.setattr(store_engine, "SQLITE_PRAGMAS", pragmas)
    async with daemon(tmp_path, sink, ("127.0.0.0/8",)) as running:
        first = await send(running.port, message())
        assert first.data is not None and first.data[0] == 250
        correction = as_attachment(sink.deliveries[-1].content)
        lock = sqlite3.connect(running.database, isolation_level=None)
        try:
            lock.execute("BEGIN EXCLUSIVE")
            before = model_dump(running.database)
            started = time.monotonic()
            locked = await asyncio.wait_for(send(running.port, correction, [SPAM_ADDRESS]), 60)
            locked_seconds = time.monotonic() - started
            during = model_dump(running.database)
        finally:
            lock.rollback()
            lock.close()
        retried = await send(running.port, correction, [SPAM_ADDRESS])
        again = await send(running.port, correction, [SPAM_ADDRESS])
        after = model_dump(running.database)
        stored = sum(
            running.sample("mailweir_feedback_total", kind=k)
            for k in ("false_positive", "false_negative", "confirmation")
        )
    assert locked.data is not None and locked.data[0] == 451, locked
    assert during == before
    assert retried.data is not None and retried.data[0] == 250, retried
    assert again.data is not None and again.data[0] == 250, again
    assert after != before and stored == 1
    print(
        f"\nABUSE | feedback while the database is locked | 451 after {locked_seconds:.1f} s, "
        "then trained once on retry"
    )


class _StuckLog:
    """A verdict log whose writes keep failing: records stay pending however often flushed."""

    pending = 1

    async def flush(self) -> None:
        await asyncio.sleep(0.01)


class _NoVerdicts:
    def find_verdict(self, tracking_id: str) -> None:
        return None


async def test_abuse_feedback_verdict_wait_is_bounded_when_the_log_cannot_write(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Regression: the wait for a not-yet-written verdict flushed the log and looped while
    records stayed pending, with no deadline on that path; under a lasting database lock a
    correction spun until a background write happened to empty the queue."""
    monkeypatch.setattr(feedback_module, "VERDICT_WAIT", 0.2)
    intake = FeedbackIntake(
        _NoVerdicts(), FeedbackSettings(), DEFAULT_OPTIONS, verdict_log=_StuckLog()
    )
    found = await asyncio.wait_for(intake._find_verdict("06h3911p06b1oaj2"), 30)
    assert found is None

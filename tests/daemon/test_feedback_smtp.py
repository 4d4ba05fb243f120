"""Feedback by mail, end to end over real sockets on 127.0.0.1.

smtplib sends, mailweir (FilterHandler behind FeedbackGate, a real Judge, ModelStore on SQLite,
VerdictLog and Metrics) receives, and an aiosmtpd sink stands in for the next hop.  The
practice's supplier reminder is trained as spam beforehand (as if imported from a folder of
junk), so it scores spam; Tobias then sends it back to the wanted-mail address.

Store counts are the oracle for exactness: after the correction every token hash the message
was judged on has moved by exactly one from the spam column to the ham column, and nothing
else changed (DESIGN.md "Learning": presence counts; train and untrain are exact inverses).
The metrics output is read back with prometheus_client's own text parser.
"""

from __future__ import annotations

import asyncio
import dataclasses
import re
import smtplib
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families
from smtp_helpers import NextHop, daemon_settings, send
from test_forwarded import as_attachment, as_inline, as_resent

from mailweir.daemon import scenario
from mailweir.daemon.feedback import FeedbackGate, FeedbackIntake, hashes_of
from mailweir.daemon.judge import Judge
from mailweir.daemon.metrics import Metrics, ReportRefresher
from mailweir.daemon.settings import FeedbackSettings, Settings
from mailweir.daemon.smtp import FilterHandler
from mailweir.daemon.smtp_server import create_smtp_server
from mailweir.daemon.verdict_log import VerdictLog
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import HAM, SPAM
from mailweir.store import ModelStore
from mailweir.store.reports import misfiling_rates, model_summary

TOBIAS = "tobias.lindqvist@harbourlane.example"
SUPPLIER = "accounts@coastal-linen.example"
WANTED = scenario.FEEDBACK_HAM
JUNK = scenario.FEEDBACK_SPAM
FORMS: dict[str, Callable[[bytes], bytes]] = {
    "attachment": as_attachment,
    "inline": as_inline,
    "resent": as_resent,
}


@dataclasses.dataclass
class Daemon:
    port: int
    store: ModelStore
    metrics: Metrics
    verdict_log: VerdictLog
    sink: NextHop
    intake: FeedbackIntake

    def counts(self, hashes: Any) -> np.ndarray:
        return np.asarray(self.store.lookup(hashes)).copy()

    def sample(self, name: str, **labels: str) -> float:
        """One sample from /metrics as Prometheus would parse it."""
        text = self.metrics.render().decode()
        for family in text_string_to_metric_families(text):
            for sample in family.samples:
                if sample.name == name and sample.labels == labels:
                    return float(sample.value)
        raise AssertionError(f"no sample {name}{labels}")

    def feedback_rows(self) -> list[tuple[Any, ...]]:
        with self.store.engine.connect() as conn:
            sql = "SELECT tracking_id, kind, channel FROM weir_feedback ORDER BY id"
            return [tuple(row) for row in conn.exec_driver_sql(sql)]


def _train(store: ModelStore, per_class: int = 30) -> None:
    items = []
    for message in scenario.training_set(per_class):
        hashes = hashes_of(message.raw, DEFAULT_OPTIONS)
        label = HAM if message.label == "ham" else SPAM
        items.append((hashes, label, message_digest(hashes), "import"))
    store.train_many(items)


@asynccontextmanager
async def feedback_daemon(
    tmp_path: Path, sink: NextHop, *, policy: dict[str, Any] | None = None, **feedback: Any
) -> AsyncIterator[Daemon]:
    store = ModelStore.open(str(tmp_path / "model.sqlite3"), staleness_seconds=0.0)
    _train(store)
    reminder = scenario.overdue_reminder().raw
    hashes = hashes_of(reminder, DEFAULT_OPTIONS)
    store.train(hashes, SPAM, digest=message_digest(hashes), source="import")
    # A small model is less sure of itself: 0.9 is where this one's spam starts.  Ham is
    # tagged too, so a missed junk message carries its id back to the spam address.
    chosen = {"min_trained": 5, "spam_threshold": 0.9, "ham_action": "tag", **(policy or {})}
    base = daemon_settings(sink.address, **chosen)
    options = {"spam_address": JUNK, "ham_address": WANTED, **feedback}
    settings: Settings = dataclasses.replace(base, feedback=FeedbackSettings(**options))
    metrics = Metrics()
    judge = Judge(store, settings)
    verdict_log = VerdictLog(store, batch_seconds=0.05)
    await verdict_log.start()
    intake = FeedbackIntake(
        store, settings.feedback, judge.options, metrics, verdict_log=verdict_log
    )
    handler = FilterHandler(settings, judge, verdict_log, metrics=metrics)
    server = await create_smtp_server(settings, FeedbackGate(handler, intake))
    try:
        port = server.sockets[0].getsockname()[1]
        yield Daemon(port, store, metrics, verdict_log, sink, intake)
    finally:
        server.close()
        await server.wait_closed()
        await verdict_log.close()
        judge.close()
        store.close()


async def _deliver_reminder(daemon: Daemon) -> tuple[bytes, str]:
    """The reminder through the filter; returns the message as delivered and its id."""
    sent = await send(daemon.port, scenario.overdue_reminder().raw, [TOBIAS], SUPPLIER)
    assert sent.data is not None and sent.data[0] == 250, sent
    delivered = daemon.sink.deliveries[-1].content
    assert b"Mailweir-Verdict: spam\r\n" in delivered
    match = re.search(rb"Mailweir-Id: (\S+)\r\n", delivered)
    assert match is not None
    return delivered, match.group(1).decode()


def _reply(sent: Any) -> tuple[int, str]:
    assert sent.data is not None, sent
    return sent.data[0], sent.data[1].decode()


# -- the three forms, retrained exactly --------------------------------------------------------


@pytest.mark.parametrize("form", sorted(FORMS))
async def test_feedback_smtp_false_positive_moves_exactly_once(
    tmp_path: Path, next_hop: NextHop, form: str
) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        delivered, tracking = await _deliver_reminder(daemon)
        hashes = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        before, totals = daemon.counts(hashes), daemon.store.class_count()
        relayed = len(next_hop.deliveries)

        sent = await send(daemon.port, FORMS[form](delivered), [WANTED], TOBIAS)
        assert sent.rcpt == [(250, b"2.1.5 Feedback address ok")]
        code, text = _reply(sent)
        assert code == 250 and "1 moved" in text and tracking in text, text

        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        assert (daemon.store.class_count() - totals).tolist() == [1, -1]
        assert len(next_hop.deliveries) == relayed  # consumed, never relayed
        assert daemon.feedback_rows() == [(tracking, "false_positive", "mail")]
        assert daemon.sample("mailweir_feedback_total", kind="false_positive") == 1

        again = await send(daemon.port, FORMS[form](delivered), [WANTED], TOBIAS)
        code, text = _reply(again)
        assert code == 250 and "1 already known" in text, text
        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        assert daemon.feedback_rows() == [(tracking, "false_positive", "mail")]
        assert daemon.sample("mailweir_feedback_total", kind="false_positive") == 1


async def test_feedback_smtp_rates_and_gauges_move(tmp_path: Path, next_hop: NextHop) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        delivered, _ = await _deliver_reminder(daemon)
        ham = scenario.generate(1, "ham", 9)[0]
        await send(daemon.port, ham.raw, [TOBIAS], ham.sender)
        await daemon.verdict_log.flush()
        engine = daemon.store.engine
        refresher = ReportRefresher(
            daemon.metrics, lambda w: misfiling_rates(engine, w), lambda: model_summary(engine)
        )
        assert await refresher.refresh()
        assert daemon.sample("mailweir_false_positive_rate", window="24h") == 0.0
        judged = daemon.sample("mailweir_judged_messages", window="24h")

        await send(daemon.port, as_attachment(delivered), [WANTED], TOBIAS)
        assert await refresher.refresh()
        assert daemon.sample("mailweir_false_positive_rate", window="24h") == 1 / judged
        assert daemon.sample("mailweir_false_positive_rate", window="7d") == 1 / judged
        assert daemon.sample("mailweir_false_negative_rate", window="24h") == 0.0


async def test_feedback_smtp_false_negative_to_the_spam_address(
    tmp_path: Path, next_hop: NextHop
) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        ham = scenario.generate(1, "ham", 4)[0]
        sent = await send(daemon.port, ham.raw, [TOBIAS], ham.sender)
        assert sent.data is not None and sent.data[0] == 250
        delivered = next_hop.deliveries[-1].content
        assert b"Mailweir-Verdict: ham\r\n" in delivered
        hashes = hashes_of(ham.raw, DEFAULT_OPTIONS)
        before = daemon.counts(hashes)
        code, text = _reply(await send(daemon.port, as_resent(delivered), [JUNK], TOBIAS))
        assert code == 250 and "1 trained" in text, text
        assert (daemon.counts(hashes) - before).tolist() == [[0, 1]] * len(hashes)
        assert daemon.sample("mailweir_feedback_total", kind="false_negative") == 1


async def test_feedback_smtp_without_id_trains_the_attached_message(
    tmp_path: Path, next_hop: NextHop
) -> None:
    # Observe mode changes no message, so no Mailweir-Id reaches the user: the attachment is
    # the message byte for byte, its tokens (and ledger digest) are the judged ones.
    async with feedback_daemon(tmp_path, next_hop, policy={"mode": "observe"}) as daemon:
        reminder = scenario.overdue_reminder().raw
        await send(daemon.port, reminder, [TOBIAS], SUPPLIER)
        delivered = next_hop.deliveries[-1].content
        assert delivered == reminder
        hashes = hashes_of(reminder, DEFAULT_OPTIONS)
        before = daemon.counts(hashes)
        code, text = _reply(await send(daemon.port, as_attachment(delivered), [WANTED], TOBIAS))
        assert code == 250 and "1 moved" in text and "no tracking id" in text, text
        assert (daemon.counts(hashes) - before).tolist() == [[1, -1]] * len(hashes)
        # Without an id the correction cannot be joined to its verdict for the rates.
        assert daemon.feedback_rows() == [(None, "confirmation", "mail")]


async def test_feedback_smtp_inline_without_id_trains_the_rebuilt_text(
    tmp_path: Path, next_hop: NextHop
) -> None:
    # Most programs leave our fields out of an inline forward.  Then the rebuilt original is
    # all there is: it is trained as wanted mail, but it is not the judged message, so the
    # spam counts the original was imported with stay (the lossy case the id exists for).
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        delivered, _ = await _deliver_reminder(daemon)
        without_id = re.sub(rb"Mailweir-[^\r]*\r\n", b"", delivered)
        hashes = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        before, totals = daemon.counts(hashes), daemon.store.class_count()
        sent = await send(daemon.port, as_inline(without_id), [WANTED], TOBIAS)
        code, text = _reply(sent)
        assert code == 250 and "1 trained" in text and "no tracking id" in text, text
        assert (daemon.store.class_count() - totals).tolist() == [1, 0]
        change = daemon.counts(hashes) - before
        assert (change[:, 1] == 0).all()  # the spam column is untouched
        assert 0.8 < change[:, 0].mean() < 1.0  # most of its tokens, not all, gained ham
        assert daemon.feedback_rows() == [(None, "confirmation", "mail")]


# -- refusals ----------------------------------------------------------------------------------


@pytest.mark.parametrize("form", sorted(FORMS))
async def test_feedback_smtp_untrusted_client_is_refused(
    tmp_path: Path, next_hop: NextHop, form: str
) -> None:
    # 127.0.0.1 outside the trusted networks stands in for a client from elsewhere.
    async with feedback_daemon(tmp_path, next_hop, trusted_networks=("192.0.2.0/24",)) as daemon:
        delivered, _ = await _deliver_reminder(daemon)
        hashes = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        before, totals = daemon.counts(hashes), daemon.store.class_count()
        ledger = daemon.store.stats().ledger_rows
        relayed = len(next_hop.deliveries)

        sent = await send(daemon.port, FORMS[form](delivered), [WANTED], TOBIAS)
        assert sent.rcpt == [(550, b"5.7.1 Feedback is accepted only from trusted networks")]
        assert sent.data is None

        assert (daemon.counts(hashes) == before).all()
        assert (daemon.store.class_count() == totals).all()
        assert daemon.store.stats().ledger_rows == ledger
        assert daemon.feedback_rows() == []
        assert len(next_hop.deliveries) == relayed
        assert daemon.sample("mailweir_feedback_refused_total", reason="untrusted") == 1
        assert daemon.sample("mailweir_feedback_total", kind="false_positive") == 0


def _rcpt_to_wanted(port: int) -> list[tuple[int, bytes]]:
    """Postfix in front, as smtplib: one RCPT with XFORWARD naming an outside client, one
    without (the forwarded client holds for one transaction only)."""
    with smtplib.SMTP("127.0.0.1", port, timeout=20) as client:
        client.ehlo("mx.harbourlane.example")
        assert client.docmd("XFORWARD ADDR=198.51.100.23 NAME=mx.mail.example")[0] == 250
        client.mail(TOBIAS)
        forwarded = client.rcpt(WANTED)
        client.rset()
        client.mail(TOBIAS)
        direct = client.rcpt(WANTED)
        client.rset()
        return [forwarded, direct]


async def test_feedback_smtp_xforward_client_outside_trusted_networks_is_refused(
    tmp_path: Path, next_hop: NextHop
) -> None:
    # Behind a mail server every connection is from 127.0.0.1 (trusted by default); XFORWARD
    # tells mailweir who the mail server's client really was (daemon/xforward.py).
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        forwarded, direct = await asyncio.to_thread(_rcpt_to_wanted, daemon.port)
        assert forwarded == (550, b"5.7.1 Feedback is accepted only from trusted networks")
        assert direct[0] == 250
        assert daemon.sample("mailweir_feedback_refused_total", reason="untrusted") == 1


async def test_feedback_smtp_rate_limit_per_sender(tmp_path: Path, next_hop: NextHop) -> None:
    junk = [m.raw for m in scenario.generate(4, "spam", 11)]
    async with feedback_daemon(tmp_path, next_hop, rate_limit_per_hour=2) as daemon:
        for raw in junk[:2]:
            code, _ = _reply(await send(daemon.port, as_attachment(raw), [JUNK], TOBIAS))
            assert code == 250
        totals = daemon.store.class_count()
        third = await send(daemon.port, as_attachment(junk[2]), [JUNK], TOBIAS)
        assert third.rcpt == [
            (451, b"4.7.1 Too many corrections from this sender, try again later")
        ]
        assert (daemon.store.class_count() == totals).all()
        assert daemon.sample("mailweir_feedback_refused_total", reason="rate_limited") == 1
        other = await send(
            daemon.port, as_attachment(junk[3]), [JUNK], "priya.raman@harbourlane.example"
        )
        assert _reply(other)[0] == 250


async def test_feedback_smtp_mixed_recipients_are_split(tmp_path: Path, next_hop: NextHop) -> None:
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        delivered, _ = await _deliver_reminder(daemon)
        relayed = len(next_hop.deliveries)
        priya = "priya.raman@harbourlane.example"
        forward = as_attachment(delivered)

        first = await send(daemon.port, forward, [WANTED, priya], TOBIAS)
        assert first.rcpt[0][0] == 250
        assert first.rcpt[1][0] == 452 and first.rcpt[1][1].startswith(b"4.5.3 ")
        assert "1 moved" in _reply(first)[1]
        assert len(next_hop.deliveries) == relayed

        second = await send(daemon.port, forward, [priya, WANTED], TOBIAS)
        assert [code for code, _ in second.rcpt] == [250, 452]
        assert _reply(second)[0] == 250
        assert next_hop.deliveries[-1].rcpt_tos == [priya]  # relayed, not trained
        assert len(daemon.feedback_rows()) == 1


async def test_feedback_smtp_note_without_original_bounces(
    tmp_path: Path, next_hop: NextHop
) -> None:
    note = (
        b"From: Priya Raman <priya.raman@harbourlane.example>\r\nTo: " + JUNK.encode() + b"\r\n"
        b"Subject: more junk\r\n\r\nWe had three parcel scams this morning.\r\n"
    )
    async with feedback_daemon(tmp_path, next_hop) as daemon:
        totals = daemon.store.class_count()
        code, text = _reply(
            await send(daemon.port, note, [JUNK], "priya.raman@harbourlane.example")
        )
        assert code == 554 and text.startswith("5.6.0 "), text
        assert (daemon.store.class_count() == totals).all()
        assert daemon.sample("mailweir_feedback_refused_total", reason="no_original") == 1


async def test_feedback_smtp_size_limit(tmp_path: Path, next_hop: NextHop) -> None:
    async with feedback_daemon(tmp_path, next_hop, max_message_bytes=2000) as daemon:
        big = as_attachment(scenario.overdue_reminder().raw + b"x" * 3000 + b"\r\n")
        declared = await send(daemon.port, big, [WANTED], TOBIAS, [f"SIZE={len(big)}"])
        assert declared.rcpt == [(552, b"5.3.4 Feedback message too big")]
        undeclared = await send(daemon.port, big, [WANTED], TOBIAS)
        assert _reply(undeclared) == (552, "5.3.4 Feedback message too big")
        assert daemon.sample("mailweir_feedback_refused_total", reason="invalid") == 2

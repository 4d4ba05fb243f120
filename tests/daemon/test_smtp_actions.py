"""End-to-end: every band and action, observe mode, forged fields, the verdict record."""

from __future__ import annotations

import asyncio
import smtplib

import pytest
from smtp_helpers import (
    HAM,
    LOCAL,
    SPAM,
    FakeJudge,
    FakeVerdictLog,
    Judged,
    daemon_settings,
    message,
    running_daemon,
    send,
)

from mailweir.daemon import replies

pytestmark = pytest.mark.timeout(60)

MAREN = "maren.okafor@harbourlane.example"
TOBIAS = "tobias.lindqvist@harbourlane.example"
QUARANTINE = "quarantine@harbourlane.example"
SPAM_TAGS = (
    b"Mailweir-Verdict: spam\r\n"
    b"Mailweir-Score: 0.9987\r\n"
    b"Mailweir-Id: 0123456789abcdef\r\n"
    b"Mailweir-Evidence: +3.20 cheap -1.50 invoice\r\n"
)
FORGED = message(
    b"Mailweir-Verdict: ham (in the body, stays)\r\n",
    Mailweir_Verdict="ham",
    MAILWEIR_SCORE="0.0000\r\n\t0.0001",
)
CLEAN = message(b"Mailweir-Verdict: ham (in the body, stays)\r\n")


async def test_tag_spam_adds_fields_on_top_and_prefixes_subject(next_hop):
    settings = daemon_settings(next_hop.address, spam_action="tag", subject_prefix="[SPAM]")
    raw = message()
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        sent = await send(daemon.port, raw)
    assert sent.data is not None and sent.data[0] == 250
    prefixed = raw.replace(b"Subject: ", b"Subject: [SPAM] ")
    assert next_hop.deliveries[0].content == SPAM_TAGS + prefixed


async def test_tag_suspect_marks_the_suspect_band(next_hop):
    suspect = Judged("00000000000000aa", "suspect", 0.7)
    settings = daemon_settings(next_hop.address, suspect_action="tag")
    async with running_daemon(settings, judge=FakeJudge(suspect)) as daemon:
        await send(daemon.port, message())
    assert next_hop.deliveries[0].content.startswith(
        b"Mailweir-Verdict: suspect\r\nMailweir-Score: 0.7000\r\nMailweir-Id: 00000000000000aa\r\n"
    )


async def test_pass_ham_relays_untouched(next_hop):
    async with running_daemon(daemon_settings(next_hop.address), judge=FakeJudge(HAM)) as daemon:
        await send(daemon.port, message())
    assert next_hop.deliveries[0].content == message()


async def test_forged_verdict_fields_removed_before_judging_and_relaying(next_hop):
    judge = FakeJudge(HAM)
    async with running_daemon(daemon_settings(next_hop.address), judge=judge) as daemon:
        await send(daemon.port, FORGED)
    assert judge.seen == [CLEAN]
    assert next_hop.deliveries[0].content == CLEAN


async def test_forged_fields_replaced_by_ours_when_tagging(next_hop):
    settings = daemon_settings(next_hop.address, spam_action="tag")
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        await send(daemon.port, FORGED)
    assert next_hop.deliveries[0].content == SPAM_TAGS + CLEAN


async def test_observe_mode_relays_spam_unchanged_and_records_it(next_hop):
    settings = daemon_settings(
        next_hop.address,
        mode="observe",
        spam_action="reject",
        position="before-queue",
        subject_prefix="[SPAM]",
    )
    log = FakeVerdictLog()
    async with running_daemon(settings, judge=FakeJudge(SPAM), verdict_log=log) as daemon:
        sent = await send(daemon.port, FORGED)
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content == FORGED
    assert [(r.band, r.action) for r in log.records] == [("spam", "pass")]


async def test_reroute_sends_to_quarantine_with_original_recipients(next_hop):
    settings = daemon_settings(
        next_hop.address, spam_action="reroute", quarantine_mailbox=QUARANTINE
    )
    raw = message()
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        sent = await send(daemon.port, raw, recipients=[MAREN, TOBIAS])
    assert [code for code, _ in sent.rcpt] == [250, 250]
    assert sent.data is not None and sent.data[0] == 250
    delivery = next_hop.deliveries[0]
    assert delivery.rcpt_tos == [QUARANTINE]
    assert delivery.content == (
        SPAM_TAGS + f"Mailweir-Original-Recipients: {MAREN},\r\n {TOBIAS}\r\n".encode() + raw
    )
    assert next_hop.rsets == 1  # the original transaction was reset before the quarantine one


async def test_reroute_declares_exact_size(next_hop):
    settings = daemon_settings(
        next_hop.address, spam_action="reroute", quarantine_mailbox=QUARANTINE
    )
    raw = message()
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        await send(daemon.port, raw, mail_options=[f"SIZE={len(raw)}"])
    delivery = next_hop.deliveries[0]
    assert delivery.mail_options == [f"SIZE={len(delivery.content)}"]


async def test_reroute_quarantine_refused_answers_451(next_hop):
    next_hop.behaviour.refuse = {QUARANTINE: "550 5.1.1 No such mailbox"}
    settings = daemon_settings(
        next_hop.address, spam_action="reroute", quarantine_mailbox=QUARANTINE
    )
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (451, b"4.3.5 Quarantine mailbox refused by next hop")
    assert next_hop.deliveries == []


async def test_reject_before_queue_answers_550_and_session_goes_on(next_hop):
    settings = daemon_settings(next_hop.address, spam_action="reject", position="before-queue")
    judge = FakeJudge(SPAM)

    def spam_then_ham(port: int) -> tuple[tuple[int, bytes], dict[str, tuple[int, bytes]]]:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            try:
                client.sendmail("offers@mail.example", [MAREN], message())
            except smtplib.SMTPDataError as exc:
                refusal = (exc.smtp_code, exc.smtp_error)
            judge.judgement = HAM
            return refusal, client.sendmail("orders@vetsupply.example", [MAREN], message())

    async with running_daemon(settings, judge=judge) as daemon:
        refusal, refused = await asyncio.to_thread(spam_then_ham, daemon.port)
    assert refusal == (550, b"5.7.1 Message refused as spam")
    assert refused == {}
    assert [d.mail_from for d in next_hop.deliveries] == ["orders@vetsupply.example"]
    assert next_hop.rsets == 1
    assert next_hop.connections == 1


async def test_reject_after_queue_tags_instead(next_hop):
    settings = daemon_settings(next_hop.address, spam_action="reject", position="after-queue")
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content.startswith(SPAM_TAGS)


async def test_unjudged_marked_and_never_rejected(next_hop):
    unjudged = Judged("00000000000000bb", "unjudged", None)
    settings = daemon_settings(next_hop.address, spam_action="reject", position="before-queue")
    async with running_daemon(settings, judge=FakeJudge(unjudged)) as daemon:
        await send(daemon.port, message())
    assert next_hop.deliveries[0].content == (
        b"Mailweir-Verdict: unjudged\r\nMailweir-Id: 00000000000000bb\r\n" + message()
    )


async def test_scoring_failure_passes_untagged_by_default(next_hop):
    failed = Judged("00000000000000cc", "failed", None)
    async with running_daemon(daemon_settings(next_hop.address), judge=FakeJudge(failed)) as d:
        sent = await send(d.port, FORGED)
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content == CLEAN


async def test_scoring_failure_tempfails_when_configured(next_hop):
    failed = Judged("00000000000000cc", "failed", None)
    settings = daemon_settings(next_hop.address, on_scoring_failure="tempfail")
    log = FakeVerdictLog()
    async with running_daemon(settings, judge=FakeJudge(failed), verdict_log=log) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (451, f"4.3.0 {replies.SCORING_FAILED.text}".encode())
    assert next_hop.deliveries == []
    assert next_hop.rsets == 1
    assert [r.action for r in log.records] == ["tempfail"]


async def test_verdict_record_describes_the_message(next_hop):
    log = FakeVerdictLog()
    settings = daemon_settings(next_hop.address, spam_action="tag")
    raw = message()
    async with running_daemon(settings, judge=FakeJudge(SPAM), verdict_log=log) as daemon:
        await send(daemon.port, raw, recipients=[MAREN, TOBIAS])
    (record,) = log.records
    assert (record.tracking_id, record.band, record.action) == ("0123456789abcdef", "spam", "tag")
    assert (record.recipients, record.size, record.score) == (2, len(raw), 0.99871)
    assert record.received_at > 0


async def test_verdict_record_for_relay_failure_says_tempfail(next_hop):
    next_hop.behaviour.data_reply = "451 4.3.0 Try later"
    log = FakeVerdictLog()
    async with running_daemon(daemon_settings(next_hop.address), verdict_log=log) as daemon:
        await send(daemon.port, message())
    assert [r.action for r in log.records] == ["tempfail"]


def sample(metrics, name: str, **labels: str) -> float:
    value = metrics.registry.get_sample_value(name, labels)
    return 0.0 if value is None else value


async def test_metrics_count_messages_and_relay_failures(next_hop):
    from mailweir.daemon.metrics import Metrics

    metrics = Metrics()
    settings = daemon_settings(next_hop.address, spam_action="tag")
    async with running_daemon(settings, judge=FakeJudge(SPAM), metrics=metrics) as daemon:
        await send(daemon.port, message())
        next_hop.behaviour.data_reply = "554 5.6.0 Content refused"
        await send(daemon.port, message())
    assert sample(metrics, "mailweir_messages_total", band="spam", action="tag") == 1
    assert sample(metrics, "mailweir_messages_total", band="spam", action="refused") == 1
    assert sample(metrics, "mailweir_next_hop_failures_total", kind="permfail") == 1
    assert sample(metrics, "mailweir_relay_seconds_count") == 2

"""End-to-end over real SMTP sockets: sender lists, exempt role mailboxes, recipient rules.

The daemon is mailweir's real SMTP side (tests/daemon/smtp_helpers.py) relaying to a real
aiosmtpd sink; only the judge is fixed.  Clients connect from 127.0.0.1 (or ::1), so the
network entries name those.
"""

from __future__ import annotations

import asyncio
import re
import smtplib
from dataclasses import replace
from typing import Any

import pytest
from smtp_helpers import (
    SPAM,
    FakeJudge,
    FakeVerdictLog,
    Judged,
    NextHop,
    daemon_settings,
    message,
    running_daemon,
    send,
)

from mailweir.daemon import replies
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.settings import HostPort, RecipientPolicy

pytestmark = pytest.mark.timeout(60)

MAREN = "maren.okafor@harbourlane.example"
PRIYA = "priya.raman@harbourlane.example"
LISTS = "vets@lists.harbourlane.example"
POSTMASTER = "postmaster@harbourlane.example"
ABUSE = "abuse@harbourlane.example"
QUARANTINE = "quarantine@harbourlane.example"
SUPPLIER = "orders@vetsupply.example"
OFFERS = "deals@offers.mail.example"
ID_LINE = re.compile(rb"Mailweir-Id: [0-9a-v]{16}\r\n")


def counted(metrics: Metrics, name: str, **labels: str) -> float:
    return metrics.registry.get_sample_value(name, labels) or 0.0


def fields_of(content: bytes) -> bytes:
    """Our fields on top of a delivered message, with the (random) tracking id blanked."""
    head = content.split(b"From: ", 1)[0]
    return ID_LINE.sub(b"Mailweir-Id: *\r\n", head)


async def run(
    next_hop: NextHop,
    *,
    judge: FakeJudge | None = None,
    sender: str = SUPPLIER,
    recipients: tuple[str, ...] = (MAREN,),
    raw: bytes | None = None,
    **policy: Any,
) -> tuple[Any, FakeVerdictLog, Metrics, FakeJudge]:
    """One transaction through a daemon with ``policy``; returns the replies, log, metrics."""
    judge = judge or FakeJudge(SPAM)
    log, metrics = FakeVerdictLog(), Metrics()
    settings = daemon_settings(next_hop.address, **policy)
    async with running_daemon(settings, judge=judge, verdict_log=log, metrics=metrics) as d:
        sent = await send(d.port, raw or message(), recipients, sender)
    return sent, log, metrics, judge


# -- allow lists ----------------------------------------------------------------------------


async def test_allow_by_address_skips_scoring_and_tags(next_hop: NextHop) -> None:
    sent, log, metrics, judge = await run(next_hop, allow_senders=(SUPPLIER,))
    assert sent.data is not None and sent.data[0] == 250
    assert judge.seen == []  # never scored
    delivery = next_hop.deliveries[0]
    assert delivery.rcpt_tos == [MAREN]
    assert fields_of(delivery.content) == (
        b"Mailweir-Verdict: sender-allowed\r\n"
        b"Mailweir-Listed: policy.allow_senders orders@vetsupply.example\r\n"
        b"Mailweir-Id: *\r\n"
    )
    assert delivery.content.endswith(message())
    record = log.records[0]
    assert (record.band, record.action, record.sender_list) == ("listed", "tag", "allow")
    assert record.score is None and record.token_hashes is None  # nothing to train from
    assert counted(metrics, "mailweir_listed_messages_total", list="allow", action="tag") == 1
    assert counted(metrics, "mailweir_messages_total", band="spam", action="tag") == 0


async def test_allow_by_domain_tree_covers_subdomains(next_hop: NextHop) -> None:
    sent, _log, _, judge = await run(
        next_hop, sender="ORDERS@eu.VetSupply.example", allow_senders=("@.vetsupply.example",)
    )
    assert sent.data is not None and sent.data[0] == 250
    assert judge.seen == []
    assert b"Mailweir-Listed: policy.allow_senders @.vetsupply.example\r\n" in (
        next_hop.deliveries[0].content
    )


async def test_allow_by_domain_is_that_domain_only(next_hop: NextHop) -> None:
    _sent, log, _, judge = await run(
        next_hop, sender="orders@eu.vetsupply.example", allow_senders=("@vetsupply.example",)
    )
    assert len(judge.seen) == 1  # scored: a subdomain is not "@vetsupply.example"
    assert log.records[0].band == "spam" and log.records[0].sender_list is None


async def test_allow_by_network_ipv4(next_hop: NextHop) -> None:
    _sent, _log, _, judge = await run(next_hop, allow_networks=("127.0.0.0/8",))
    assert judge.seen == []
    assert b"Mailweir-Listed: policy.allow_networks 127.0.0.0/8\r\n" in (
        next_hop.deliveries[0].content
    )


def _send_over_ipv6(port: int, raw: bytes) -> tuple[int, bytes]:
    with smtplib.SMTP("::1", port, local_hostname="mx.mail.example", timeout=20) as client:
        client.sendmail(SUPPLIER, [MAREN], raw)
        return client.noop()


async def test_allow_by_network_ipv6(next_hop: NextHop) -> None:
    settings = daemon_settings(next_hop.address, allow_networks=("::1/128",))
    settings = replace(settings, smtp=replace(settings.smtp, listen=HostPort("::1", 0)))
    judge = FakeJudge(SPAM)
    async with running_daemon(settings, judge=judge) as daemon:
        await asyncio.to_thread(_send_over_ipv6, daemon.port, message())
    assert judge.seen == []
    assert b"Mailweir-Listed: policy.allow_networks ::1/128\r\n" in next_hop.deliveries[0].content


# -- block lists, in each mode --------------------------------------------------------------


async def test_block_reject_before_queue_answers_550_5_7_1(next_hop: NextHop) -> None:
    sent, log, metrics, judge = await run(
        next_hop,
        sender=OFFERS,
        judge=FakeJudge(Judged("00000000000000h1", "ham", 0.01)),
        block_senders=("@offers.mail.example",),
        block_action="reject",
        position="before-queue",
    )
    # RFC 3463 section 3.8: X.7.1 "Delivery not authorized, message refused".
    assert sent.data == (550, b"5.7.1 " + replies.SENDER_REFUSED.text.encode())
    assert next_hop.deliveries == [] and judge.seen == []  # never scored, even as ham
    assert (log.records[0].band, log.records[0].action) == ("listed", "reject")
    assert log.records[0].sender_list == "block"
    assert counted(metrics, "mailweir_listed_messages_total", list="block", action="reject") == 1


async def test_block_reroute_sends_to_quarantine(next_hop: NextHop) -> None:
    sent, log, _, _ = await run(
        next_hop,
        sender=OFFERS,
        recipients=(MAREN, PRIYA),
        block_senders=("@offers.mail.example",),
        block_action="reroute",
        quarantine_mailbox=QUARANTINE,
    )
    assert sent.data is not None and sent.data[0] == 250
    delivery = next_hop.deliveries[0]
    assert delivery.rcpt_tos == [QUARANTINE]
    assert fields_of(delivery.content) == (
        b"Mailweir-Verdict: sender-blocked\r\n"
        b"Mailweir-Listed: policy.block_senders @offers.mail.example\r\n"
        b"Mailweir-Id: *\r\n" + f"Mailweir-Original-Recipients: {MAREN},\r\n {PRIYA}\r\n".encode()
    )
    assert (log.records[0].action, log.records[0].sender_list) == ("reroute", "block")


async def test_block_tag_marks_subject(next_hop: NextHop) -> None:
    _sent, log, _, _ = await run(
        next_hop,
        sender=OFFERS,
        block_networks=("127.0.0.0/8",),
        block_action="tag",
        subject_prefix="[BLOCKED]",
    )
    content = next_hop.deliveries[0].content
    assert content.startswith(b"Mailweir-Verdict: sender-blocked\r\n")
    assert b"Subject: [BLOCKED] Your order 4411\r\n" in content
    assert (log.records[0].action, log.records[0].sender_list) == ("tag", "block")


async def test_block_observe_mode_relays_unchanged_and_records(next_hop: NextHop) -> None:
    sent, log, metrics, judge = await run(
        next_hop,
        sender=OFFERS,
        mode="observe",
        position="before-queue",
        block_senders=("@offers.mail.example",),
        block_action="reject",
    )
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content == message()
    assert judge.seen == []
    assert (log.records[0].action, log.records[0].sender_list) == ("pass", "block")
    assert counted(metrics, "mailweir_listed_messages_total", list="block", action="pass") == 1


async def test_block_wins_over_allow(next_hop: NextHop) -> None:
    # A sender on the allow list, from a blocked network: the network decides.
    sent, log, _, _ = await run(
        next_hop,
        allow_senders=("@vetsupply.example",),
        block_networks=("127.0.0.0/8",),
        block_action="reject",
        position="before-queue",
    )
    assert sent.data is not None and sent.data[0] == 550
    assert log.records[0].sender_list == "block"


# -- exempt role mailboxes ------------------------------------------------------------------


@pytest.mark.parametrize("role", [POSTMASTER, ABUSE, "Abuse@Lists.harbourlane.example"])
async def test_exempt_role_mailbox_blocked_sender_only_tagged(next_hop: NextHop, role: str) -> None:
    sent, log, _, _ = await run(
        next_hop,
        sender=OFFERS,
        recipients=(role,),
        block_senders=("@offers.mail.example",),
        block_action="reject",
        position="before-queue",
    )
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].rcpt_tos == [role]
    assert next_hop.deliveries[0].content.startswith(b"Mailweir-Verdict: sender-blocked\r\n")
    assert log.records[0].action == "tag"


async def test_exempt_role_mailbox_spam_never_rerouted(next_hop: NextHop) -> None:
    _sent, _, _, _ = await run(
        next_hop, recipients=(ABUSE,), spam_action="reroute", quarantine_mailbox=QUARANTINE
    )
    assert next_hop.deliveries[0].rcpt_tos == [ABUSE]
    assert next_hop.deliveries[0].content.startswith(b"Mailweir-Verdict: spam\r\n")


async def test_exempt_and_normal_recipient_together_are_both_tagged(next_hop: NextHop) -> None:
    sent, log, _, _ = await run(
        next_hop,
        recipients=(POSTMASTER, MAREN),
        spam_action="reject",
        position="before-queue",
    )
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].rcpt_tos == [POSTMASTER, MAREN]
    assert next_hop.deliveries[0].content.startswith(b"Mailweir-Verdict: spam\r\n")
    assert log.records[0].action == "tag"


# -- per-recipient cut-offs and actions -----------------------------------------------------

SUSPECT_093 = Judged("00000000000000s9", "suspect", 0.93)  # suspect by the default cut-offs
MAREN_RULE = RecipientPolicy(MAREN, spam_threshold=0.9, spam_action="reroute")


async def test_recipient_rule_changes_outcome_for_one_mailbox(next_hop: NextHop) -> None:
    policy = {"recipient": (MAREN_RULE,), "quarantine_mailbox": QUARANTINE}
    await run(next_hop, judge=FakeJudge(SUSPECT_093), recipients=(MAREN,), **policy)
    await run(next_hop, judge=FakeJudge(SUSPECT_093), recipients=(PRIYA,), **policy)
    maren, priya = next_hop.deliveries
    assert maren.rcpt_tos == [QUARANTINE]  # 0.93 >= her 0.9: spam, rerouted
    assert maren.content.startswith(b"Mailweir-Verdict: spam\r\nMailweir-Score: 0.9300\r\n")
    assert priya.rcpt_tos == [PRIYA]  # 0.93 < 0.98: suspect, tagged
    assert priya.content.startswith(b"Mailweir-Verdict: suspect\r\n")


async def test_recipient_rule_shared_transaction_delivers_to_both(next_hop: NextHop) -> None:
    _, log, metrics, _ = await run(
        next_hop,
        judge=FakeJudge(SUSPECT_093),
        recipients=(MAREN, PRIYA),
        recipient=(MAREN_RULE,),
        quarantine_mailbox=QUARANTINE,
    )
    # Priya's policy tags it; it must reach her, so Maren gets it tagged too, as spam.
    delivery = next_hop.deliveries[0]
    assert delivery.rcpt_tos == [MAREN, PRIYA]
    assert delivery.content.startswith(b"Mailweir-Verdict: spam\r\n")
    assert (log.records[0].band, log.records[0].action) == ("spam", "tag")
    assert counted(metrics, "mailweir_messages_total", band="spam", action="tag") == 1


async def test_no_reject_for_a_recipient_whose_rule_passes_it(next_hop: NextHop) -> None:
    lenient = RecipientPolicy("@lists.harbourlane.example", spam_threshold=0.999)
    policy = {"spam_action": "reject", "position": "before-queue", "recipient": (lenient,)}
    alone, _, _, _ = await run(next_hop, recipients=(MAREN,), **policy)
    assert alone.data is not None and alone.data[0] == 550  # 0.9987: spam for Maren
    both, log, _, _ = await run(next_hop, recipients=(MAREN, LISTS), **policy)
    assert both.data is not None and both.data[0] == 250  # suspect for the list: tagged
    assert next_hop.deliveries[0].rcpt_tos == [MAREN, LISTS]
    assert log.records[0].action == "tag"

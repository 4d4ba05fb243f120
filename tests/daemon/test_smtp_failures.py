"""End-to-end: when the next hop or the filter fails, the upstream hears a reply that keeps
the message (4xx, RFC 5321 section 4.2.1: "the sender-SMTP should ... try again") or, for the
next hop's own permanent refusals, the same 5xx with its text."""

from __future__ import annotations

import asyncio
import smtplib

import pytest
from smtp_helpers import (
    LOCAL,
    FakeJudge,
    daemon_settings,
    free_port,
    message,
    running_daemon,
    send,
    silent_server,
)

from mailweir.daemon import replies
from mailweir.daemon.settings import HostPort

pytestmark = pytest.mark.timeout(60)

MAREN = "maren.okafor@harbourlane.example"
TOBIAS = "tobias.lindqvist@harbourlane.example"
PRIYA = "priya.raman@harbourlane.example"


def wire(reply: replies.Reply) -> tuple[int, bytes]:
    """A reply as smtplib reports it."""
    return reply.code, f"{reply.enhanced} {reply.text}".encode()


async def test_relay_next_hop_down_answers_451(next_hop):
    settings = daemon_settings(HostPort(LOCAL, free_port()))
    async with running_daemon(settings) as daemon:
        sent = await send(daemon.port, message(), recipients=[MAREN, TOBIAS])
    # Both recipients hear 451 4.4.1; the second without a second connection attempt.
    assert sent.rcpt == [wire(replies.NEXT_HOP_DOWN)] * 2
    assert sent.data is None


async def test_relay_next_hop_silent_at_greeting_answers_451():
    async with (
        silent_server() as address,
        running_daemon(daemon_settings(address, relay_timeout=0.5)) as daemon,
    ):
        sent = await send(daemon.port, message())
    assert sent.rcpt == [wire(replies.NEXT_HOP_DOWN)]


async def test_relay_next_hop_hangs_at_data_answers_451(next_hop):
    next_hop.behaviour.hang_at_data = True
    async with running_daemon(daemon_settings(next_hop.address, relay_timeout=0.5)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == wire(replies.NEXT_HOP_TIMEOUT)
    assert next_hop.deliveries == []


async def test_relay_next_hop_4xx_at_data_answers_4xx(next_hop):
    next_hop.behaviour.data_reply = "452 4.3.1 Insufficient system storage"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (452, b"4.3.1 Insufficient system storage")


async def test_relay_next_hop_421_at_data_answers_451(next_hop):
    next_hop.behaviour.data_reply = "421 4.3.2 Shutting down"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (451, b"4.3.2 Shutting down")


async def test_relay_next_hop_5xx_at_data_answers_5xx_with_its_text(next_hop):
    next_hop.behaviour.data_reply = "554 5.6.0 Content refused by policy"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (554, b"5.6.0 Content refused by policy")


async def test_relay_next_hop_5xx_without_enhanced_code_gets_5_0_0(next_hop):
    next_hop.behaviour.data_reply = "550 No thanks"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (550, b"5.0.0 No thanks")  # RFC 3463 section 3.1, X.0.0


async def test_relay_refused_recipients_reported_one_by_one(next_hop):
    next_hop.behaviour.refuse = {
        TOBIAS: "550 5.1.1 No such mailbox here",
        PRIYA: "450 4.2.1 Mailbox busy, try later",
    }
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=[MAREN, TOBIAS, PRIYA])
    assert sent.rcpt == [
        (250, b"2.1.5 Recipient ok"),
        (550, b"5.1.1 No such mailbox here"),
        (450, b"4.2.1 Mailbox busy, try later"),
    ]
    assert sent.data is not None and sent.data[0] == 250
    assert [d.rcpt_tos for d in next_hop.deliveries] == [[MAREN]]


async def test_relay_all_recipients_refused_sends_nothing(next_hop):
    next_hop.behaviour.refuse = {MAREN: "550 5.1.1 No such mailbox here"}
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=[MAREN])
    assert sent.rcpt == [(550, b"5.1.1 No such mailbox here")]
    assert next_hop.deliveries == []


async def test_relay_next_hop_lost_mid_transaction_answers_451_at_data(next_hop):
    next_hop.behaviour.drop_at_rcpt = {TOBIAS}
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=[MAREN, TOBIAS, PRIYA])
    # Maren was accepted before the next hop hung up, so the DATA is refused for her: 451,
    # and the upstream keeps the message for all three.
    gone = (451, b"4.3.2 Service shutting down")  # the next hop's 421, as 451
    assert sent.rcpt == [(250, b"2.1.5 Recipient ok"), gone, gone]
    assert sent.data == wire(replies.NEXT_HOP_LOST)
    assert next_hop.deliveries == []


async def test_relay_sender_refused_by_next_hop_answers_each_rcpt(next_hop):
    next_hop.behaviour.mail_reply = "553 5.7.1 Sender not allowed"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=[MAREN, TOBIAS])
    assert sent.rcpt == [(553, b"5.7.1 Sender not allowed")] * 2


async def test_relay_next_hop_gone_between_transactions_reconnects(next_hop):
    def two_messages(port: int) -> list[dict[str, tuple[int, bytes]]]:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            first = client.sendmail("orders@vetsupply.example", [MAREN], message())
            close_next_hop_side()
            return [first, client.sendmail("orders@vetsupply.example", [TOBIAS], message())]

    loop = asyncio.get_running_loop()

    def close_next_hop_side() -> None:
        done = asyncio.run_coroutine_threadsafe(drop_sink_connections(), loop)
        done.result(timeout=10)

    async def drop_sink_connections() -> None:
        for protocol in list(next_hop.protocols):
            protocol.transport.close()
        await asyncio.sleep(0.1)

    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        refused = await asyncio.to_thread(two_messages, daemon.port)
    assert refused == [{}, {}]
    assert len(next_hop.deliveries) == 2
    assert next_hop.connections == 2


async def test_handle_exception_answers_451_and_session_goes_on(next_hop):
    judge = FakeJudge(error=RuntimeError("secret internals"))

    def failing_then_fine(port: int) -> tuple[tuple[int, bytes], dict[str, tuple[int, bytes]]]:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            try:
                client.sendmail("orders@vetsupply.example", [MAREN], message())
            except smtplib.SMTPDataError as exc:
                failure = (exc.smtp_code, exc.smtp_error)
            judge.error = None
            return failure, client.sendmail("orders@vetsupply.example", [MAREN], message())

    async with running_daemon(daemon_settings(next_hop.address), judge=judge) as daemon:
        failure, refused = await asyncio.to_thread(failing_then_fine, daemon.port)
    assert failure == wire(replies.LOCAL_ERROR)
    assert b"secret" not in failure[1]
    assert refused == {}
    assert len(next_hop.deliveries) == 1


async def exchange(port: int, commands: bytes) -> list[bytes]:
    """Send raw command lines (ending with QUIT) and return every reply line."""
    reader, writer = await asyncio.open_connection(LOCAL, port)
    writer.write(b"EHLO mx.mail.example\r\n" + commands)
    answers = (await reader.read()).split(b"\r\n")
    writer.close()
    return answers


async def test_relay_recipient_with_control_characters_answers_553(next_hop):
    # aiosmtplib will not write a control character into a command; a 451 here would have the
    # upstream retry a hopeless address for days.
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        answers = await exchange(
            daemon.port,
            b"MAIL FROM:<orders@vetsupply.example>\r\n"
            b"RCPT TO:<a\x01b@harbourlane.example>\r\n"
            b"RCPT TO:<maren.okafor@harbourlane.example>\r\nQUIT\r\n",
        )
    assert str(replies.BAD_RECIPIENT_SYNTAX).encode() in answers
    assert b"250 2.1.5 Recipient ok" in answers


async def test_relay_sender_with_control_characters_answers_553(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        answers = await exchange(
            daemon.port,
            b"MAIL FROM:<a\x01b@vetsupply.example>\r\n"
            b"RCPT TO:<maren.okafor@harbourlane.example>\r\nQUIT\r\n",
        )
    assert str(replies.BAD_SENDER_SYNTAX).encode() in answers

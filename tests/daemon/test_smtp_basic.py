"""End-to-end over real sockets: smtplib -> mailweir -> aiosmtpd sink, the normal path."""

from __future__ import annotations

import asyncio
import smtplib
from dataclasses import replace

import aiosmtplib
import pytest
from smtp_helpers import LOCAL, daemon_settings, message, running_daemon, send

from mailweir.daemon import replies

pytestmark = pytest.mark.timeout(60)

PRACTICE = [
    "maren.okafor@harbourlane.example",
    "tobias.lindqvist@harbourlane.example",
    "priya.raman@harbourlane.example",
]


async def test_relay_passes_ham_byte_exact(next_hop):
    raw = message()
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw)
    assert sent.data is not None and sent.data[0] == 250
    assert [d.content for d in next_hop.deliveries] == [raw]
    assert next_hop.deliveries[0].mail_from == "orders@vetsupply.example"


async def test_relay_answers_250_with_next_hop_text_and_tracking_id(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message())
    assert sent.data == (250, b"2.0.0 Queued as Q1 (mailweir id 0123456789abcdeg)")


async def test_relay_answers_each_rcpt_with_next_hop_answer(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=PRACTICE)
    assert sent.rcpt == [(250, b"2.1.5 Recipient ok")] * 3
    assert next_hop.deliveries[0].rcpt_tos == PRACTICE


async def test_relay_keeps_dot_lines_and_binary_bytes(next_hop):
    body = b".\r\n..two dots\r\n.leading dot\r\nend\xff\xfe\r\n\r\n \r\n"
    raw = message(body)
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await send(daemon.port, raw, mail_options=["BODY=8BITMIME"])
    assert next_hop.deliveries[0].content == raw


async def test_relay_turns_bare_line_feeds_into_crlf(next_hop):
    # RFC 5321 section 2.3.8: SMTP data has no line ending but CRLF; aiosmtplib turns a lone
    # CR or LF into CRLF on the way out, so "\n.\n" can never end the message early downstream.
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await send(daemon.port, message(b"one\ntwo\rthree\r\n"))
    assert next_hop.deliveries[0].content == message(b"one\r\ntwo\r\nthree\r\n")


async def test_relay_8bit_mail_declares_8bitmime(next_hop):
    raw = message("Die Impfung für Bello ist am Dienstag.\r\n".encode(), Subject="Impfung")
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw, mail_options=["BODY=8BITMIME"])
    assert sent.data is not None and sent.data[0] == 250
    delivery = next_hop.deliveries[0]
    assert (delivery.content, delivery.mail_options) == (raw, ["BODY=8BITMIME"])


async def test_relay_smtputf8_addresses_and_headers(next_hop):
    sender = "bestellung@tierbedarf-müller.example"
    recipient = "maren.okafor@harbourlane.example"
    raw = message("Grüße\r\n".encode(), From=f"Müller <{sender}>", Subject="Grüße")
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw, [recipient], sender, ["SMTPUTF8", "BODY=8BITMIME"])
    assert sent.data is not None and sent.data[0] == 250
    delivery = next_hop.deliveries[0]
    assert (delivery.mail_from, delivery.content) == (sender, raw)
    assert "SMTPUTF8" in delivery.mail_options


async def test_relay_forwards_size_with_room_for_our_fields(next_hop):
    raw = message()
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await send(daemon.port, raw, mail_options=[f"SIZE={len(raw)}"])
    assert next_hop.deliveries[0].mail_options == [f"SIZE={len(raw) + 4096}"]


async def test_relay_many_recipients_in_one_message(next_hop):
    recipients = [f"client{i}@harbourlane.example" for i in range(50)]
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=recipients)
    assert all(code == 250 for code, _ in sent.rcpt)
    assert next_hop.deliveries[0].rcpt_tos == recipients


async def test_relay_too_many_recipients_answers_452(next_hop):
    recipients = [f"client{i}@harbourlane.example" for i in range(52)]
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), recipients=recipients)
    expected = (452, f"{replies.TOO_MANY_RECIPIENTS.enhanced} Too many recipients".encode())
    assert sent.rcpt[50:] == [expected, expected]
    assert next_hop.deliveries[0].rcpt_tos == recipients[:50]


async def test_relay_declared_size_over_limit_answers_552(next_hop):
    settings = daemon_settings(next_hop.address)
    async with running_daemon(settings) as daemon:
        sent = await send(daemon.port, message(), mail_options=["SIZE=9000000"])
    assert sent.mail == (552, b"5.3.4 Message too big")
    assert next_hop.deliveries == [] and next_hop.connections == 0


async def test_relay_oversize_data_answers_552(next_hop):
    raw = message(b"x" * 1000 + b"\r\n") + b"y" * 998 * 9000
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw + b"\r\n")
    assert sent.data == (552, b"5.3.4 Message too big")
    assert next_hop.deliveries == []


@pytest.mark.slow
async def test_relay_2mb_line_relayed_intact(next_hop):
    # aiosmtpd answers 500 to a DATA line over 1,001 bytes by default; behind the queue that
    # bounces accepted mail, so any line within the size limit must pass.
    raw = message(b"A" * (2 * 1024 * 1024) + b"\r\nafter the long line\r\n")
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw)
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content == raw


async def test_relay_reuses_next_hop_connection_across_transactions(next_hop):
    def two_messages(port: int) -> None:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            for recipient in PRACTICE[:2]:
                client.sendmail("orders@vetsupply.example", [recipient], message())

    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await asyncio.to_thread(two_messages, daemon.port)
    assert len(next_hop.deliveries) == 2
    assert next_hop.connections == 1


async def test_relay_rset_resets_the_next_hop_transaction(next_hop):
    def abandoned_then_sent(port: int) -> None:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            client.ehlo()
            client.mail("orders@vetsupply.example")
            client.rcpt(PRACTICE[0])
            client.rset()
            client.sendmail("orders@vetsupply.example", [PRACTICE[1]], message())

    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await asyncio.to_thread(abandoned_then_sent, daemon.port)
    assert next_hop.rsets == 1
    assert [d.rcpt_tos for d in next_hop.deliveries] == [[PRACTICE[1]]]


async def test_relay_closes_next_hop_when_upstream_quits(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await send(daemon.port, message())
        for _ in range(100):
            if not next_hop.protocols:
                break
            await asyncio.sleep(0.05)
        assert not next_hop.protocols


async def test_relay_closes_next_hop_when_upstream_vanishes(next_hop):
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        writer.write(b"EHLO mx.mail.example\r\nMAIL FROM:<a@mail.example>\r\n")
        writer.write(b"RCPT TO:<b@harbourlane.example>\r\n")
        while not (await reader.readline()).startswith(b"250 2.1.5"):
            pass
        assert next_hop.protocols
        writer.transport.abort()
        for _ in range(100):
            if not next_hop.protocols:
                break
            await asyncio.sleep(0.05)
        assert not next_hop.protocols
    assert next_hop.deliveries == []


@pytest.mark.slow
async def test_relay_50_concurrent_clients_all_delivered_once(next_hop):
    async def one(index: int, port: int) -> None:
        raw = message(Message_ID=f"<{index}@vetsupply.example>")
        await aiosmtplib.send(
            raw,
            sender="orders@vetsupply.example",
            recipients=[PRACTICE[index % 3]],
            hostname=LOCAL,
            port=port,
            start_tls=False,
            timeout=30,
        )

    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        await asyncio.gather(*(one(i, daemon.port) for i in range(50)))
    ids = sorted(d.content.split(b"Message-ID: <")[1].split(b"@")[0] for d in next_hop.deliveries)
    assert ids == sorted(str(i).encode() for i in range(50))


async def test_smtp_max_connections_answers_421(next_hop):
    settings = daemon_settings(next_hop.address)
    settings = replace(settings, smtp=replace(settings.smtp, max_connections=1))
    async with running_daemon(settings) as daemon:
        first_reader, first_writer = await asyncio.open_connection(LOCAL, daemon.port)
        assert (await first_reader.readline()).startswith(b"220 ")
        second_reader, second_writer = await asyncio.open_connection(LOCAL, daemon.port)
        refusal = await second_reader.readline()
        assert refusal == str(replies.TOO_MANY_CONNECTIONS).encode() + b"\r\n"
        for writer in (first_writer, second_writer):
            writer.close()


async def test_smtp_advertises_the_extensions(next_hop):
    def ehlo(port: int) -> bytes:
        with smtplib.SMTP(LOCAL, port, local_hostname="mx.mail.example", timeout=20) as client:
            return client.ehlo()[1]

    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        features = await asyncio.to_thread(ehlo, daemon.port)
    for extension in (b"8BITMIME", b"SMTPUTF8", b"PIPELINING", b"SIZE 8388608"):
        assert extension in features.split(b"\n")


async def test_relay_single_line_over_size_limit_answers_552(next_hop):
    # One line longer than the whole size limit: aiosmtpd would call it "line too long" (500);
    # with the line limit at the size limit it can only be a message too big.
    raw = message(b"Z" * (8 * 1024 * 1024 + 10) + b"\r\n")
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, raw)
    assert sent.data == (552, b"5.3.4 Message too big")
    assert next_hop.deliveries == []


async def test_smtp_pipelined_commands_answered_in_order(next_hop):
    # RFC 2920 section 3.1: the client may send the whole envelope at once.
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        await reader.readline()
        writer.write(b"EHLO mx.mail.example\r\n")
        while not (await reader.readline()).startswith(b"250 "):
            pass
        writer.write(
            b"MAIL FROM:<orders@vetsupply.example>\r\n"
            + b"".join(b"RCPT TO:<%s>\r\n" % address.encode() for address in PRACTICE)
            + b"DATA\r\n"
        )
        answers = [await reader.readline() for _ in range(5)]
        writer.write(message() + b".\r\nQUIT\r\n")
        answers += [await reader.readline(), await reader.readline()]
        writer.close()
    codes = [answer[:3] for answer in answers]
    assert codes == [b"250", b"250", b"250", b"250", b"354", b"250", b"221"]
    assert next_hop.deliveries[0].content == message()


async def test_relay_null_sender_of_a_bounce(next_hop):
    # RFC 5321 section 4.5.5: delivery status notifications come from the null reverse-path.
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        sent = await send(daemon.port, message(), sender="")
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].mail_from == "<>"  # aiosmtpd's spelling of the empty path


async def test_relay_non_ascii_recipient_without_smtputf8_left_to_next_hop(next_hop):
    # The next hop decides about an address the client should have declared SMTPUTF8 for;
    # we pass its bytes on unchanged rather than fail the transaction ourselves.
    recipient = "tierärztin@harbourlane.example"
    async with running_daemon(daemon_settings(next_hop.address)) as daemon:
        reader, writer = await asyncio.open_connection(LOCAL, daemon.port)
        writer.write(b"EHLO mx.mail.example\r\nMAIL FROM:<orders@vetsupply.example>\r\n")
        writer.write(f"RCPT TO:<{recipient}>\r\nQUIT\r\n".encode())
        answers = (await reader.read()).split(b"\r\n")
        writer.close()
    assert b"250 2.1.5 Recipient ok" in answers

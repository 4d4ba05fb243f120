"""XFORWARD: parsing (daemon/xforward.py) and the SMTP side over real sockets.

Syntax and attribute meanings from Postfix's XFORWARD_README (attribute values are xtext as in
RFC 3461 section 4; "[UNAVAILABLE]" and "[TEMPUNAVAIL]" mean "not known"; IPv6 addresses carry
an "IPV6:" prefix: from memory of Postfix's behaviour, no other source).  The daemon tests
stand in for Postfix with smtplib, connecting from 127.0.0.1 (in the default
smtp.xforward_networks) or from 127.0.0.2 (outside it; Linux routes all of 127/8 to lo).
"""

from __future__ import annotations

import asyncio
import ipaddress
import smtplib
from dataclasses import replace

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from smtp_helpers import SPAM, FakeJudge, NextHop, daemon_settings, message, running_daemon

from mailweir.daemon import xforward
from mailweir.daemon.settings import Settings, SmtpSettings

pytestmark = pytest.mark.timeout(60)

MAREN = "maren.okafor@harbourlane.example"
OFFERS = "deals@offers.mail.example"
OUTSIDE = "198.51.100.23"  # the client Postfix talked to (documentation range, RFC 5737)


# -- parsing --------------------------------------------------------------------------------


def test_parse_reads_every_attribute_case_insensitively() -> None:
    found = xforward.parse(
        "name=mx.offers.mail.example ADDR=198.51.100.23 Proto=ESMTP HELO=mx.offers.mail.example"
        " SOURCE=REMOTE"
    )
    assert found == xforward.Forwarded(
        addr=OUTSIDE,
        name="mx.offers.mail.example",
        helo="mx.offers.mail.example",
        proto="ESMTP",
        source="REMOTE",
    )
    assert found.peer == (OUTSIDE, 0)


def test_parse_adds_to_what_an_earlier_command_said() -> None:
    first = xforward.parse("ADDR=198.51.100.23")
    both = xforward.parse("HELO=mx.offers.mail.example", first)
    assert (both.addr, both.helo) == (OUTSIDE, "mx.offers.mail.example")


def test_parse_decodes_xtext() -> None:
    # RFC 3461 section 4: "+" followed by two upper-case hex digits stands for one octet.
    assert xforward.parse("HELO=odd+3Dname+2Bmore").helo == "odd=name+more"


def test_parse_ipv6_prefix_and_normal_form() -> None:
    assert xforward.parse("ADDR=IPV6:2001:DB8:0:0::7").addr == "2001:db8::7"


@pytest.mark.parametrize("unknown", ["[UNAVAILABLE]", "[TEMPUNAVAIL]"])
def test_parse_unknown_values_clear_the_attribute(unknown: str) -> None:
    earlier = xforward.parse("ADDR=198.51.100.23 NAME=mx.offers.mail.example")
    found = xforward.parse(f"ADDR={unknown} NAME={unknown}", earlier)
    assert found == xforward.Forwarded()
    assert found.peer is None


@pytest.mark.parametrize(
    "arg",
    ["", "ADDR", "COLOUR=blue", "ADDR=not-an-address", "ADDR=198.51.100.300", "NAME=" + "a" * 300],
)
def test_parse_refuses_malformed_arguments_with_501(arg: str) -> None:
    with pytest.raises(xforward.XforwardError) as caught:
        xforward.parse(arg)
    assert (caught.value.reply.code, caught.value.reply.enhanced) == (501, "5.5.4")


# -- over SMTP ------------------------------------------------------------------------------


def _settings(next_hop: NextHop, **policy: object) -> Settings:
    return daemon_settings(next_hop.address, **policy)


def _dialogue(
    port: int, commands: list[str], source: str = "127.0.0.1", send_mail: bool = True
) -> tuple[bytes, list[tuple[int, bytes]], tuple[int, bytes] | None]:
    """EHLO, the given commands, then (optionally) one message; the EHLO text and replies."""
    with smtplib.SMTP(timeout=20, source_address=(source, 0)) as client:
        client.connect("127.0.0.1", port)
        _, ehlo = client.ehlo("mx.harbourlane.example")
        replies = [client.docmd(command) for command in commands]
        sent = None
        if send_mail:
            try:
                refused = client.sendmail(OFFERS, [MAREN], message())
                sent = (250, repr(refused).encode())
            except smtplib.SMTPResponseException as exc:
                sent = (exc.smtp_code, exc.smtp_error)
        return ehlo, replies, sent


async def dialogue(
    port: int, commands: list[str], source: str = "127.0.0.1", send_mail: bool = True
) -> tuple[bytes, list[tuple[int, bytes]], tuple[int, bytes] | None]:
    return await asyncio.to_thread(_dialogue, port, commands, source, send_mail)


async def test_xforward_offered_to_the_mail_server_and_names_the_client(
    next_hop: NextHop,
) -> None:
    settings = _settings(next_hop, block_networks=("198.51.100.0/24",), block_action="tag")
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        ehlo, replies, sent = await dialogue(
            daemon.port, [f"XFORWARD NAME=mx.offers.mail.example ADDR={OUTSIDE}"]
        )
    assert b"XFORWARD NAME ADDR PROTO HELO SOURCE" in ehlo
    assert replies == [(250, b"2.0.0 Ok")]
    assert sent is not None and sent[0] == 250
    # The site policy's network list saw the forwarded client, not 127.0.0.1.
    content = next_hop.deliveries[0].content
    assert b"Mailweir-Listed: policy.block_networks 198.51.100.0/24\r\n" in content
    assert daemon.verdict_log.records[0].sender_list == "block"


async def test_xforward_holds_for_one_transaction_only(next_hop: NextHop) -> None:
    settings = _settings(next_hop, block_networks=("198.51.100.0/24",), block_action="tag")

    def two_messages(port: int) -> None:
        with smtplib.SMTP("127.0.0.1", port, timeout=20) as client:
            client.ehlo("mx.harbourlane.example")
            assert client.docmd(f"XFORWARD ADDR={OUTSIDE}")[0] == 250
            client.sendmail(OFFERS, [MAREN], message())
            client.sendmail(OFFERS, [MAREN], message())  # no XFORWARD before this one

    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        await asyncio.to_thread(two_messages, daemon.port)
        lists = [record.sender_list for record in daemon.verdict_log.records]
    assert lists == ["block", None]


async def test_xforward_refused_from_outside_xforward_networks(next_hop: NextHop) -> None:
    settings = _settings(next_hop, block_networks=("198.51.100.0/24",), block_action="tag")
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        ehlo, replies, sent = await dialogue(
            daemon.port, [f"XFORWARD ADDR={OUTSIDE}"], source="127.0.0.2"
        )
    assert b"XFORWARD" not in ehlo
    assert replies == [(550, b"5.7.0 XFORWARD not permitted from this client")]
    assert sent is not None and sent[0] == 250
    assert daemon.verdict_log.records[0].sender_list is None  # the claim was not believed


async def test_xforward_switched_off_with_empty_networks(next_hop: NextHop) -> None:
    settings = _settings(next_hop)
    settings = replace(settings, smtp=replace(settings.smtp, xforward_networks=()))
    async with running_daemon(settings) as daemon:
        ehlo, replies, _ = await dialogue(daemon.port, [f"XFORWARD ADDR={OUTSIDE}"])
    assert b"XFORWARD" not in ehlo
    assert replies[0][0] == 550


async def test_xforward_sequence_errors(next_hop: NextHop) -> None:
    def misuse(port: int) -> list[tuple[int, bytes]]:
        with smtplib.SMTP("127.0.0.1", port, timeout=20) as client:
            before_ehlo = client.docmd(f"XFORWARD ADDR={OUTSIDE}")
            client.ehlo("mx.harbourlane.example")
            client.mail(OFFERS)
            in_transaction = client.docmd(f"XFORWARD ADDR={OUTSIDE}")
            client.rset()
            malformed = client.docmd("XFORWARD COLOUR=blue")
            return [before_ehlo, in_transaction, malformed]

    async with running_daemon(_settings(next_hop)) as daemon:
        replies = await asyncio.to_thread(misuse, daemon.port)
    assert [(code, text[:5]) for code, text in replies] == [
        (503, b"5.5.1"),
        (503, b"5.5.1"),
        (501, b"5.5.4"),
    ]


def test_default_xforward_networks_are_loopback_only() -> None:
    assert SmtpSettings().xforward_networks == ("127.0.0.1/32", "::1/128")


# -- passing it on to the next hop ----------------------------------------------------------

EVERY = "NAME ADDR PROTO HELO SOURCE"
_ASCII_TEXT = st.text(st.characters(min_codepoint=0x20, max_codepoint=0x7E), max_size=255)


def test_command_lines_name_only_what_the_next_hop_offers() -> None:
    client = xforward.Forwarded(addr=OUTSIDE, name="mx.offers.mail.example", helo="a+b=c")
    assert xforward.command_lines(client, "addr helo") == [
        f"ADDR={OUTSIDE} HELO=a+2Bb+3Dc".encode()  # xtext, RFC 3461 section 4
    ]
    # Not known: "[UNAVAILABLE]", as Postfix writes it; SOURCE has no such form and is left out.
    assert xforward.command_lines(xforward.Forwarded(), EVERY) == [
        b"NAME=[UNAVAILABLE] ADDR=[UNAVAILABLE] PROTO=[UNAVAILABLE] HELO=[UNAVAILABLE]"
    ]
    assert xforward.command_lines(xforward.Forwarded(addr="2001:db8::7"), "ADDR") == [
        b"ADDR=IPV6:2001:db8::7"
    ]


@given(
    addr=st.one_of(st.none(), st.ip_addresses().map(str)),
    name=_ASCII_TEXT,
    helo=_ASCII_TEXT,
    proto=st.sampled_from(["SMTP", "ESMTP", ""]),
    source=st.sampled_from(["LOCAL", "REMOTE", ""]),
)
@settings(max_examples=200, deadline=None)
def test_command_lines_read_back_by_the_parser_as_sent(
    addr: str | None, name: str, helo: str, proto: str, source: str
) -> None:
    """What we send, our own receiving side (and so Postfix's syntax) reads back: every
    line within the 512-byte command limit (RFC 5321 section 4.5.3.1.4)."""
    client = xforward.Forwarded(
        addr=addr, name=name or None, helo=helo or None, proto=proto or None, source=source or None
    )
    lines = xforward.command_lines(client, EVERY)
    assert all(len(b"XFORWARD " + line + b"\r\n") <= 512 for line in lines)
    read: xforward.Forwarded | None = None
    for line in lines:
        read = xforward.parse(line.decode("ascii"), read)
    unknown = xforward.NOT_KNOWN
    expected = xforward.Forwarded(
        addr=None if addr is None else str(ipaddress.ip_address(addr)),
        name=None if client.name in (None, unknown) else client.name,
        helo=None if client.helo in (None, unknown) else client.helo,
        proto=client.proto,
        source=client.source,
    )
    assert read == expected


async def test_next_hop_hears_the_forwarded_client_then_the_connection_itself(
    next_hop: NextHop,
) -> None:
    next_hop.behaviour.offer_xforward = EVERY

    def two_messages(port: int) -> None:
        with smtplib.SMTP("127.0.0.1", port, timeout=20) as client:
            client.ehlo("mx.harbourlane.example")
            told = f"XFORWARD NAME=mx.offers.mail.example ADDR={OUTSIDE} HELO=offers PROTO=ESMTP"
            assert client.docmd(told)[0] == 250
            client.sendmail(OFFERS, [MAREN], message())
            client.sendmail(OFFERS, [MAREN], message())  # no XFORWARD before this one

    async with running_daemon(_settings(next_hop)) as daemon:
        await asyncio.to_thread(two_messages, daemon.port)
    first, second = (_told(delivery.xforward) for delivery in next_hop.deliveries)
    assert first == xforward.Forwarded(
        addr=OUTSIDE, name="mx.offers.mail.example", helo="offers", proto="ESMTP"
    )
    # Nothing forwarded: the client mailweir itself talked to (no name: mailweir looks none up).
    assert second == xforward.Forwarded(
        addr="127.0.0.1", helo="mx.harbourlane.example", proto="ESMTP"
    )
    assert len(next_hop.deliveries) == 2


async def test_next_hop_hears_only_the_attributes_it_lists(next_hop: NextHop) -> None:
    next_hop.behaviour.offer_xforward = "ADDR HELO"
    async with running_daemon(_settings(next_hop)) as daemon:
        await dialogue(daemon.port, [f"XFORWARD NAME=mx.offers.mail.example ADDR={OUTSIDE}"])
    assert next_hop.deliveries[0].xforward == [f"ADDR={OUTSIDE} HELO=[UNAVAILABLE]"]


async def test_rerouted_mail_carries_the_client_to_the_next_hop(next_hop: NextHop) -> None:
    next_hop.behaviour.offer_xforward = EVERY
    settings = _settings(
        next_hop, spam_action="reroute", quarantine_mailbox="quarantine@harbourlane.example"
    )
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        _, _, sent = await dialogue(daemon.port, [f"XFORWARD ADDR={OUTSIDE}"])
    assert sent is not None and sent[0] == 250
    (delivery,) = next_hop.deliveries
    assert delivery.rcpt_tos == ["quarantine@harbourlane.example"]
    assert _told(delivery.xforward).addr == OUTSIDE


async def test_a_refused_xforward_loses_no_mail(next_hop: NextHop) -> None:
    next_hop.behaviour.offer_xforward = EVERY
    next_hop.behaviour.xforward_reply = "550 5.7.0 Not authorized"
    async with running_daemon(_settings(next_hop)) as daemon:
        _, _, sent = await dialogue(daemon.port, [])
    assert sent is not None and sent[0] == 250
    assert len(next_hop.deliveries) == 1


@pytest.mark.parametrize("offered, switched_on", [(None, True), (EVERY, False)])
async def test_next_hop_hears_nothing_unless_offered_and_switched_on(
    next_hop: NextHop, offered: str | None, switched_on: bool
) -> None:
    next_hop.behaviour.offer_xforward = offered
    settings = _settings(next_hop)
    settings = replace(settings, next_hop=replace(settings.next_hop, send_xforward=switched_on))
    async with running_daemon(settings) as daemon:
        _, _, sent = await dialogue(daemon.port, [f"XFORWARD ADDR={OUTSIDE}"])
    assert sent is not None and sent[0] == 250
    assert next_hop.deliveries[0].xforward == []  # (the sink answers 500 to an unoffered one)


def _told(arguments: list[str]) -> xforward.Forwarded:
    told = xforward.Forwarded()
    for argument in arguments:
        told = xforward.parse(argument, told)
    return told

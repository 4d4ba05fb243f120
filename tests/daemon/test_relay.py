"""The next-hop client on its own: error mapping, parameters, connection reuse."""

from __future__ import annotations

import pytest
from aiosmtplib import errors as smtp_errors
from aiosmtplib.protocol import PERIOD_REGEX, normalize_message_line_endings
from hypothesis import given, settings
from hypothesis import strategies as st
from smtp_helpers import LOCAL, free_port, silent_server

from mailweir.daemon import replies
from mailweir.daemon.errors import NextHopRejected, NextHopUnavailable, reply_for
from mailweir.daemon.relay import (
    MailParameters,
    NextHopSession,
    RelayTimeouts,
    data_wire,
    error_for_answer,
    relay_errors,
)
from mailweir.daemon.settings import HostPort, NextHopSettings

pytestmark = pytest.mark.timeout(30)

GENEROUS = RelayTimeouts(connect=10.0, command=10.0, data=10.0)
SHORT = RelayTimeouts(connect=0.5, command=0.5, data=0.5)


def client(address: HostPort, timeouts: RelayTimeouts = GENEROUS) -> NextHopSession:
    return NextHopSession(address, "filter.harbourlane.example", timeouts)


@pytest.mark.parametrize(
    ("error", "reply"),
    [
        (smtp_errors.SMTPConnectError("refused"), replies.NEXT_HOP_DOWN),
        (smtp_errors.SMTPConnectTimeoutError("slow"), replies.NEXT_HOP_DOWN),
        (smtp_errors.SMTPConnectResponseError(554, "go away"), replies.NEXT_HOP_DOWN),
        (smtp_errors.SMTPReadTimeoutError("slow"), replies.NEXT_HOP_TIMEOUT),
        (smtp_errors.SMTPServerDisconnected("gone"), replies.NEXT_HOP_LOST),
        (ConnectionResetError("reset"), replies.NEXT_HOP_LOST),
        (ConnectionRefusedError("refused"), replies.NEXT_HOP_DOWN),
        (TimeoutError(), replies.NEXT_HOP_TIMEOUT),
    ],
)
def test_relay_errors_maps_transport_failures_to_4xx(error, reply):
    with pytest.raises(NextHopUnavailable) as caught, relay_errors():
        raise error
    assert reply_for(caught.value) is reply
    assert caught.value.__cause__ is error


def test_relay_errors_keeps_a_5xx_answer_permanent():
    with pytest.raises(NextHopRejected) as caught, relay_errors():
        raise smtp_errors.SMTPDataError(554, "5.7.1 Refused by local policy")
    assert reply_for(caught.value) == replies.Reply(554, "5.7.1", "Refused by local policy")


def test_error_for_answer_passes_4xx_and_turns_421_into_451():
    assert error_for_answer(452, "4.3.1 Full").reply == replies.Reply(452, "4.3.1", "Full")
    assert error_for_answer(421, "Closing").reply == replies.Reply(451, "4.0.0", "Closing")


def test_from_next_hop_ignores_enhanced_code_of_the_wrong_class():
    # RFC 3463 section 2: the class digit must match the reply's first digit.
    assert replies.from_next_hop(550, "4.1.1 odd") == replies.Reply(550, "5.0.0", "4.1.1 odd")


def test_reply_renders_multiline_text_as_continuation_lines():
    reply = replies.Reply(550, "5.7.1", "first line\nsecond\x00line")
    assert str(reply) == "550-5.7.1 first line\r\n550 5.7.1 second line"


@pytest.mark.parametrize(
    ("options", "expected"),
    [
        ([], MailParameters()),
        (["SIZE=1234", "BODY=8BITMIME", "SMTPUTF8"], MailParameters(1234, True, True)),
        (["BODY=7BIT", "SIZE=x"], MailParameters()),
    ],
)
def test_mail_parameters_from_aiosmtpd_options(options, expected):
    assert MailParameters.from_options(options) == expected


def test_relay_timeouts_from_settings():
    settings = NextHopSettings(connect_timeout=3, command_timeout=4, data_timeout=5)
    assert RelayTimeouts.from_settings(settings) == RelayTimeouts(3, 4, 5)


async def test_next_hop_session_refused_connection_raises_unavailable():
    session = client(HostPort(LOCAL, free_port()))
    with pytest.raises(NextHopUnavailable) as caught:
        await session.start("a@mail.example", MailParameters())
    assert caught.value.reply is replies.NEXT_HOP_DOWN
    assert not session.connected


async def test_next_hop_session_silent_server_times_out_connecting():
    async with silent_server() as address:
        session = client(address, SHORT)
        with pytest.raises(NextHopUnavailable) as caught:
            await session.start("a@mail.example", MailParameters())
    assert caught.value.reply is replies.NEXT_HOP_DOWN


async def test_next_hop_session_one_connection_for_several_transactions(next_hop):
    session = client(next_hop.address)
    for number in range(3):
        await session.start("a@mail.example", MailParameters())
        assert (await session.add_recipient("b@harbourlane.example")).code == 250
        assert (await session.send(b"Subject: %d\r\n\r\nx\r\n" % number)).code == 250
    await session.close()
    assert (next_hop.connections, len(next_hop.deliveries)) == (1, 3)


async def test_next_hop_session_resets_an_open_transaction_before_the_next(next_hop):
    session = client(next_hop.address)
    await session.start("a@mail.example", MailParameters())
    await session.add_recipient("b@harbourlane.example")
    await session.start("c@mail.example", MailParameters())
    await session.add_recipient("d@harbourlane.example")
    await session.send(b"Subject: x\r\n\r\nx\r\n")
    await session.close()
    assert next_hop.rsets == 1
    assert [(d.mail_from, d.rcpt_tos) for d in next_hop.deliveries] == [
        ("c@mail.example", ["d@harbourlane.example"])
    ]


async def test_next_hop_session_data_refused_keeps_the_dialogue_in_step(next_hop):
    # The next hop refuses DATA itself (no recipient was accepted): a permanent refusal with
    # its own code, and the same connection then carries the next message.
    session = client(next_hop.address)
    await session.start("a@mail.example", MailParameters())
    with pytest.raises(NextHopRejected) as refused:
        await session.send(b"Subject: x\r\n\r\nx\r\n")
    assert refused.value.reply.code == 503
    await session.start("a@mail.example", MailParameters())
    await session.add_recipient("b@harbourlane.example")
    assert (await session.send(b"Subject: y\r\n\r\n.y\r\n")).code == 250
    await session.close()
    assert next_hop.connections == 1
    assert [d.content for d in next_hop.deliveries] == [b"Subject: y\r\n\r\n.y\r\n"]


async def test_next_hop_session_without_transaction_cannot_send():
    with pytest.raises(NextHopUnavailable):
        await client(HostPort(LOCAL, free_port())).send(b"x\r\n")


def test_reply_text_with_undecodable_bytes_still_renders():
    text = b"Mailbox \xff full".decode("utf-8", "surrogateescape")
    assert str(replies.Reply(452, "4.2.2", text)) == "452 4.2.2 Mailbox ? full"


# Lines of every kind a message may hold: dot lines, lone CR and LF, CRLF, bytes beyond ASCII.
WIRE_BYTES = st.lists(
    st.sampled_from([b".", b"..", b"x", b"Otis", b"\r\n", b"\n", b"\r", b" ", b"\xff", b".\r\n"]),
    max_size=30,
).map(b"".join)


@settings(max_examples=3000, deadline=None)
@given(WIRE_BYTES)
def test_data_wire_is_what_aiosmtplib_sends(message: bytes) -> None:
    # Oracle: aiosmtplib's own DATA transform (protocol.py, execute_data_command).
    expected = PERIOD_REGEX.sub(b"..", normalize_message_line_endings(message)) + b".\r\n"
    assert data_wire(message) == expected

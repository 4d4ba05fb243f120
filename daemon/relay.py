"""The next-hop side of the proxy: one aiosmtplib client per upstream connection.

The SMTP handler drives a :class:`NextHopSession` in lock-step with its upstream client: the
first RCPT opens the next-hop transaction (connect, EHLO, MAIL FROM), every RCPT is answered
with the next hop's own reply for that recipient, and the end of DATA sends the message on the
same transaction.  The connection is kept for the next upstream transaction (RFC 5321 section
4.1.1.5: RSET between transactions) and closed when the upstream connection ends.  A next hop
that offers XFORWARD hears who the client was before each MAIL (daemon/xforward.py).

Every aiosmtplib or socket error is mapped into the error tree by :func:`relay_errors`.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass

import aiosmtplib
from aiosmtplib import errors as smtp_errors
from aiosmtplib.protocol import PERIOD_REGEX, normalize_message_line_endings

from mailweir.daemon import replies, xforward
from mailweir.daemon.errors import NextHopRejected, NextHopUnavailable, RelayError
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import HostPort, NextHopSettings
from mailweir.daemon.socket_reads import read_from_heap

log = logging.getLogger(__name__)

# aiosmtplib refuses to put these on a command line (and rightly: CR and LF would inject
# commands), so an address carrying one is refused here with a proper reply.
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")

# Our header fields make the relayed message a little larger than the SIZE the upstream
# declared (RFC 1870 section 6: the declared size is the client's estimate); this much room is
# generous for the tag fields.  Rerouted messages declare their exact size instead.
HEADER_ALLOWANCE = 4096


@dataclass(frozen=True)
class RelayTimeouts:
    """Seconds allowed for each phase of the next-hop dialogue (RFC 5321 section 4.5.3.2)."""

    connect: float  # TCP connect and the 220 greeting
    command: float  # each of EHLO, MAIL, RCPT, RSET, QUIT
    data: float  # the 354 and the reply after the final dot

    @classmethod
    def from_settings(cls, settings: NextHopSettings) -> RelayTimeouts:
        return cls(settings.connect_timeout, settings.command_timeout, settings.data_timeout)


@dataclass(frozen=True)
class MailParameters:
    """The MAIL FROM parameters that matter to the next hop (RFC 1870, 6152, 6531)."""

    size: int | None = None
    eight_bit: bool = False
    smtputf8: bool = False

    @classmethod
    def from_options(cls, options: Sequence[str]) -> MailParameters:
        """Read aiosmtpd's ``envelope.mail_options`` (already upper-cased)."""
        size: int | None = None
        eight_bit = smtputf8 = False
        for option in options:
            key, _, value = option.upper().partition("=")
            if key == "SIZE" and value.isdigit():
                size = int(value)
            elif key == "BODY":
                eight_bit = value == "8BITMIME"
            elif key == "SMTPUTF8":
                smtputf8 = True
        return cls(size, eight_bit, smtputf8)


@contextmanager
def relay_errors() -> Iterator[None]:
    """Re-raise aiosmtplib and socket errors as :class:`RelayError` (from the original)."""
    try:
        yield
    except RelayError:
        raise
    except smtp_errors.SMTPConnectError as exc:
        # Refused, unreachable, timed out while connecting, or the greeting was not 220.
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_DOWN) from exc
    except smtp_errors.SMTPTimeoutError as exc:
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_TIMEOUT) from exc
    except smtp_errors.SMTPServerDisconnected as exc:
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_LOST) from exc
    except smtp_errors.SMTPResponseException as exc:
        raise error_for_answer(exc.code, exc.message) from exc
    except smtp_errors.SMTPException as exc:
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_DOWN) from exc
    except TimeoutError as exc:
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_TIMEOUT) from exc
    except ConnectionRefusedError as exc:
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_DOWN) from exc
    except OSError as exc:  # reset, broken pipe, unreachable network
        raise NextHopUnavailable(str(exc), replies.NEXT_HOP_LOST) from exc


def data_wire(message: bytes) -> bytes:
    """``message`` as SMTP DATA carries it: each line ending CRLF, a line that starts with "."
    sent with one more (RFC 5321 section 4.5.2), then the lone dot.

    aiosmtplib's ``data`` makes these bytes with its own two steps, which rewrite every line
    ending and search every line start with regular expressions (31 µs for 4 KB, 0.74 ms for
    100 KB).  A message that arrived by SMTP needs neither, and counting its CRs and LFs and
    looking for "\n." tells so in a third of that; the steps run only when needed.
    """
    crlf = message.count(b"\r\n")
    lone = message.count(b"\n") != crlf or message.count(b"\r") != crlf  # a lone LF or CR
    if lone or not message.endswith(b"\r\n"):
        message = normalize_message_line_endings(message)
    if message.startswith(b".") or b"\n." in message:
        message = PERIOD_REGEX.sub(b"..", message)
    return message + b".\r\n"


def error_for_answer(code: int, message: str) -> RelayError:
    """The error for a next-hop answer that is not a success.

    A 5xx stays permanent with the next hop's own code, enhanced code and text.  Anything else
    becomes temporary: the next hop's 4xx is passed on, except that its 421 ("closing the
    channel", RFC 5321 section 3.8) becomes 451, since our upstream connection stays open.
    """
    answer = replies.from_next_hop(code, message)
    if 500 <= code < 600:
        return NextHopRejected(answer.code, answer.enhanced, answer.text)
    if 400 <= code < 500:
        code = 451 if code == 421 else code
        return NextHopUnavailable(message, Reply(code, answer.enhanced, answer.text))
    return NextHopUnavailable(f"unexpected answer {code} {message}", replies.NEXT_HOP_LOST)


def _address(address: str) -> bytes:
    """An address in angle brackets, as the bytes the upstream sent (aiosmtpd decodes them as
    UTF-8 with surrogateescape); a non-ASCII address without SMTPUTF8 is the next hop's to
    judge.  aiosmtpd reports the null reverse-path of bounces (RFC 5321 section 4.5.5) as "<>",
    which must stay "<>"."""
    if address in ("", "<>"):
        return b"<>"
    return f"<{address}>".encode("utf-8", "surrogateescape")


class NextHopSession:
    """One upstream connection's client to the next hop, reused across its transactions."""

    def __init__(self, address: HostPort, helo_name: str, timeouts: RelayTimeouts) -> None:
        self.address = address
        self.helo_name = helo_name
        self.timeouts = timeouts
        self._client: aiosmtplib.SMTP | None = None
        self._in_transaction = False

    @property
    def connected(self) -> bool:
        return self._client is not None and self._client.is_connected

    async def start(
        self,
        sender: str,
        params: MailParameters,
        extra_size: int = 0,
        client: xforward.Forwarded | None = None,
    ) -> None:
        """Open a next-hop transaction: connect if needed, RSET an open one, XFORWARD
        ``client`` if given and offered, MAIL FROM.

        A connection kept from an earlier transaction may have been closed by the next hop
        in the meantime; that case gets one fresh connection before giving up.
        """
        reused = self.connected
        try:
            await self._start(sender, params, extra_size, client)
        except NextHopUnavailable as exc:
            if not reused or exc.reply is not replies.NEXT_HOP_LOST:
                raise
            log.info("next hop dropped a kept connection; reconnecting")
            self.abort()
            await self._start(sender, params, extra_size, client)

    async def _start(
        self,
        sender: str,
        params: MailParameters,
        extra_size: int,
        forwarded: xforward.Forwarded | None,
    ) -> None:
        client = await self._connection()
        if self._in_transaction:
            await self.reset()
            client = await self._connection()
        if forwarded is not None and client.supports_extension("xforward"):
            await self._tell_client(client, forwarded)
        options: list[bytes] = []
        if params.size is not None and client.supports_extension("size"):
            options.append(b"SIZE=%d" % (params.size + extra_size))
        if params.eight_bit and client.supports_extension("8bitmime"):
            options.append(b"BODY=8BITMIME")
        if params.smtputf8:
            if not client.supports_extension("smtputf8"):
                raise NextHopUnavailable("next hop lacks SMTPUTF8", replies.NEXT_HOP_NO_SMTPUTF8)
            options.append(b"SMTPUTF8")
        if _CONTROL.search(sender):
            bad = replies.BAD_SENDER_SYNTAX
            raise NextHopRejected(bad.code, bad.enhanced, bad.text)
        with relay_errors():
            answer = await client.execute_command(
                b"MAIL",
                b"FROM:" + _address(sender),
                *options,
                timeout=self.timeouts.command,
            )
        if answer.code != 250:
            raise error_for_answer(answer.code, answer.message)
        self._in_transaction = True

    async def _tell_client(self, client: aiosmtplib.SMTP, forwarded: xforward.Forwarded) -> None:
        """XFORWARD before MAIL.  It only informs: a refusal is logged and the mail goes on
        (the next hop then names mailweir as the client, as without XFORWARD)."""
        offered = client.esmtp_extensions.get("xforward", "")
        for line in xforward.command_lines(forwarded, offered):
            with relay_errors():
                answer = await client.execute_command(
                    b"XFORWARD", line, timeout=self.timeouts.command
                )
            if answer.code == 421:
                raise error_for_answer(answer.code, answer.message)
            if answer.code != 250:
                log.warning("next hop refused XFORWARD: %s %s", answer.code, answer.message)
                return

    async def add_recipient(self, address: str) -> Reply:
        """RCPT TO; returns the next hop's own answer (success or refusal) for this recipient.

        Raises :class:`RelayError` only when the connection itself failed.
        """
        client = self._require_client()
        if _CONTROL.search(address):
            return replies.BAD_RECIPIENT_SYNTAX
        with relay_errors():
            answer = await client.execute_command(
                b"RCPT", b"TO:" + _address(address), timeout=self.timeouts.command
            )
        if answer.code == 421:  # the next hop is closing the channel, not refusing a recipient
            raise error_for_answer(answer.code, answer.message)
        return replies.from_next_hop(answer.code, answer.message)

    async def send(self, message: bytes) -> Reply:
        """DATA with ``message``; returns the next hop's 250 or raises :class:`RelayError`.

        The message goes as :func:`data_wire` makes it: dot-stuffed, a lone CR or LF turned
        into CRLF (RFC 5321 section 2.3.8 allows no other line ending in SMTP data), so a
        message that arrived by SMTP (every line ending CRLF) passes unchanged.
        """
        client = self._require_client()
        self._in_transaction = False  # after DATA, pass or fail, the transaction is over
        try:
            with relay_errors():
                answer = await self._data(client, data_wire(message))
        except RelayError as exc:
            if isinstance(exc, NextHopUnavailable):
                self.abort()  # a failed DATA can leave the dialogue out of step
            raise
        return replies.from_next_hop(answer.code, answer.message)

    async def _data(self, client: aiosmtplib.SMTP, wire: bytes) -> aiosmtplib.SMTPResponse:
        """DATA, then the message as it goes on the wire.  aiosmtplib's own ``data`` would make
        that form again, in two regular-expression passes over the whole message."""
        start = await client.execute_command(b"DATA", timeout=self.timeouts.data)
        if start.code != 354:
            # The transaction is still open at the next hop: RSET before the next MAIL.
            self._in_transaction = True
            raise smtp_errors.SMTPDataError(start.code, start.message)
        protocol = client.protocol
        if protocol is None:
            raise smtp_errors.SMTPServerDisconnected("Connection lost")
        # No await between the write and the read, so the answer cannot arrive unawaited.
        protocol.write(wire)
        answer = await protocol.read_response(timeout=self.timeouts.data)
        if answer.code != 250:
            raise smtp_errors.SMTPDataError(answer.code, answer.message)
        return answer

    async def reset(self) -> None:
        """End an open next-hop transaction (RSET); a failure only drops the connection."""
        if not self._in_transaction:
            return
        self._in_transaction = False
        if not self.connected:
            return
        assert self._client is not None
        try:
            with relay_errors():
                answer = await self._client.execute_command(b"RSET", timeout=self.timeouts.command)
            if answer.code != 250:
                raise error_for_answer(answer.code, answer.message)
        except RelayError as exc:
            log.info("RSET to next hop failed (%s); dropping the connection", exc)
            self.abort()

    async def close(self) -> None:
        """QUIT politely, then close; never raises."""
        client, self._client = self._client, None
        self._in_transaction = False
        if client is None or not client.is_connected:
            return
        try:
            with relay_errors():
                # The upstream waits for our 221 meanwhile; a polite QUIT is not worth long.
                await client.execute_command(b"QUIT", timeout=min(self.timeouts.command, 5.0))
        except RelayError as exc:
            log.debug("QUIT to next hop failed: %s", exc)
        finally:
            client.close()

    def abort(self) -> None:
        """Drop the connection without a word (after an error, or when upstream vanished)."""
        client, self._client = self._client, None
        self._in_transaction = False
        if client is not None:
            client.close()

    async def _connection(self) -> aiosmtplib.SMTP:
        if self._client is not None and self._client.is_connected:
            return self._client
        self.abort()
        client = aiosmtplib.SMTP(
            hostname=self.address.host,
            port=self.address.port,
            local_hostname=self.helo_name,
            timeout=self.timeouts.command,
            start_tls=False,
        )
        try:
            with relay_errors():
                await client.connect(timeout=self.timeouts.connect)
                try:
                    await client.ehlo(timeout=self.timeouts.command)
                except smtp_errors.SMTPHeloError:
                    await client.helo(timeout=self.timeouts.command)
        except RelayError:
            client.close()
            raise
        read_from_heap(client.transport)
        self._client = client
        return client

    def _require_client(self) -> aiosmtplib.SMTP:
        if self._client is None or not self._client.is_connected:
            raise NextHopUnavailable("no open next-hop transaction", replies.NEXT_HOP_LOST)
        return self._client

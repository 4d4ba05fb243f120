"""The SMTP listener: aiosmtpd's protocol with what a filter in the mail path needs.

Connection admission against floods (daemon/admission.py), a short wait for the first
command, XFORWARD from the mail server in front (daemon/xforward.py), an idle timeout that a
slow relay does not trip, DATA read in a few large reads (daemon/smtp_data.py) and our own
wording of aiosmtpd's replies.  What happens to each
message is :class:`~mailweir.daemon.smtp.FilterHandler`'s business.
"""

from __future__ import annotations

import asyncio
import logging
import socket
import ssl
from collections.abc import Callable, Coroutine, Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any, AnyStr

from aiosmtpd.smtp import MISSING, SMTP, Envelope, Session, syntax

from mailweir.daemon import replies, site_policy, smtp_paths, xforward
from mailweir.daemon.admission import Admission
from mailweir.daemon.relay import NextHopSession
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import Settings, SmtpSettings
from mailweir.daemon.smtp_data import read_data
from mailweir.daemon.socket_reads import read_from_heap

if TYPE_CHECKING:
    from mailweir.daemon.smtp import FilterHandler

log = logging.getLogger("mailweir.smtp")

# aiosmtpd words these replies itself, without enhanced codes (its DATA replies no longer
# arise: smtp_DATA below answers a message too big with our own).
_OWN_WORDING_BYTES = {
    b"552 Error: message size exceeds fixed maximum message size": str(replies.MESSAGE_TOO_BIG),
}
# Looked up by the reply as aiosmtpd pushes it, str or bytes (the same text either way).
_OWN_WORDING: dict[Any, str] = {
    **_OWN_WORDING_BYTES,
    **{raw.decode("ascii"): ours for raw, ours in _OWN_WORDING_BYTES.items()},
}


class FilterSession(Session):
    """One upstream connection; ``relay`` is its next-hop client, opened at the first RCPT."""

    relay: NextHopSession | None = None


class FilterEnvelope(Envelope):
    """One transaction; ``relay_failure`` answers every later RCPT once the next hop failed;
    ``forwarded`` is what XFORWARD said about the upstream's client (daemon/xforward.py)."""

    relay_open: bool = False
    relay_failure: Reply | None = None
    forwarded: xforward.Forwarded | None = None


class Connections:
    """The open upstream connections of one server, for the caps and for shutdown.

    ``admission`` decides who may connect (daemon/admission.py); without one, only the total
    ``limit`` applies.
    """

    def __init__(self, limit: int, admission: Admission | None = None) -> None:
        self.admission = admission or Admission(limit)
        self.protocols: set[FilterSMTP] = set()
        self.turned_away: set[FilterSMTP] = set()  # refused at connect, still closing
        self.closing = False  # set at shutdown: late arrivals get SHUTTING_DOWN

    @classmethod
    def from_settings(cls, smtp: SmtpSettings) -> Connections:
        return cls(smtp.max_connections, Admission.from_settings(smtp))

    @property
    def limit(self) -> int:
        return self.admission.limit

    def admit(self, protocol: FilterSMTP, host: str | None) -> Reply | None:
        """Count ``protocol`` in, or return the refusal to send before closing it."""
        refusal = replies.SHUTTING_DOWN if self.closing else self.admission.admit(host, self.active)
        if refusal is None:
            self.protocols.add(protocol)
        else:
            self.turned_away.add(protocol)
        return refusal

    def release(self, protocol: FilterSMTP, host: str | None) -> None:
        if protocol in self.protocols:
            self.protocols.discard(protocol)
            self.admission.release(host)

    @property
    def active(self) -> int:
        return len(self.protocols)

    @property
    def all_gone(self) -> bool:
        """No connection left open, counted or turned away."""
        return not self.protocols and not self.turned_away

    @property
    def working(self) -> int:
        """Connections in the middle of a relay (a RCPT or a DATA being passed on)."""
        return sum(1 for protocol in self.protocols if protocol.working)

    def close_all(self) -> None:
        for protocol in list(self.protocols):
            if protocol.transport is not None:
                protocol.transport.close()

    def abort_all(self) -> None:
        """Cut off every connection still open, unsent replies and all."""
        for protocol in [*self.protocols, *self.turned_away]:
            if protocol.transport is not None:
                protocol.transport.abort()

    def close_idle(self) -> None:
        """At shutdown: refuse newcomers, and tell each connection left open that we close."""
        self.closing = True
        for protocol in list(self.protocols):
            transport = protocol.transport
            if transport is None or transport.is_closing() or protocol.envelope.rcpt_tos:
                continue  # gone already, or inside a transaction the drain waits for
            _close_with(transport, replies.SHUTTING_DOWN)


class _FirstVerbEndsWait(dict[str, Any]):
    """aiosmtpd's table of command methods, which it asks for each command line's verb; the
    first verb it finds there (any command it knows) ends the short wait for a first command.

    Wrapping each method instead put one more coroutine under every command of every message
    and cost 14 ``functools.wraps`` per connection."""

    def __init__(self, methods: dict[str, Any], on_first: Callable[[], None]) -> None:
        super().__init__(methods)
        self._on_first: Callable[[], None] | None = on_first

    def get(self, verb: str, default: Any = None) -> Any:  # type: ignore[override]
        method = super().get(verb, default)
        if method is not None and self._on_first is not None:
            on_first, self._on_first = self._on_first, None
            on_first()
        return method


class FilterSMTP(SMTP):
    """aiosmtpd's SMTP with the changes a filter in the mail path needs."""

    def __init__(
        self,
        handler: FilterHandler,
        *,
        smtp: SmtpSettings,
        hostname: str,
        connections: Connections,
        xforward_networks: site_policy.Networks,
        tls_context: ssl.SSLContext | None = None,
        loop: asyncio.AbstractEventLoop | None = None,
    ) -> None:
        # RFC 5321 section 4.5.3.1.6 asks for 1,000-octet lines, but behind the queue a 500 for
        # a longer line makes the upstream bounce mail it accepted; any line that fits the
        # size limit passes (+2 for CRLF, +1 for a transparency dot).
        self.line_length_limit = smtp.max_message_bytes + 3
        super().__init__(
            handler,
            data_size_limit=smtp.max_message_bytes,
            enable_SMTPUTF8=True,
            decode_data=False,
            hostname=hostname,
            ident="mailweir",
            tls_context=tls_context,
            timeout=smtp.command_timeout,
            loop=loop,
        )
        self._connections = connections
        self._xforward_networks = xforward_networks
        self._counted = False
        self._refused = False
        self._peer_host: str | None = None
        self.working = False
        self._idle_timer = False  # whether the running timer is the plain idle timeout
        self._last_activity = 0.0  # loop time of the last command or data
        self._busy_until = 0.0  # loop time a busy() relay may last until
        # A client that never sends a command is cut off after smtp.first_command_timeout;
        # the first command it sends (any verb aiosmtpd knows) ends that wait.
        self._first_command_timeout = smtp.first_command_timeout
        self._first_command_timer: asyncio.TimerHandle | None = None
        self._smtp_methods = _FirstVerbEndsWait(self._smtp_methods, self._end_first_wait)

    def _create_session(self) -> Session:
        return FilterSession(self.loop)

    def _create_envelope(self) -> Envelope:
        return FilterEnvelope()

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        if not self._counted:  # the first call; STARTTLS calls again on the same connection
            peer = transport.get_extra_info("peername")
            self._peer_host = peer[0] if isinstance(peer, tuple) and peer else None
            refusal = self._connections.admit(self, self._peer_host)
            if refusal is not None:
                self._refused = True
                _close_with(transport, refusal)
                return
            self._counted = True
            self._first_command_timer = self.loop.call_later(
                self._first_command_timeout, self._no_first_command
            )
        elif isinstance(self.session, FilterSession) and self.session.relay is not None:
            self.session.relay.abort()  # STARTTLS starts a new session (RFC 3207 section 4.2)
        read_from_heap(transport)
        super().connection_made(transport)

    def connection_lost(self, error: Exception | None) -> None:
        if self._refused:
            self._connections.turned_away.discard(self)
            asyncio.StreamReaderProtocol.connection_lost(self, error)
            return
        if self._counted:
            self._connections.release(self, self._peer_host)
            self._counted = False
        self._end_first_wait()
        session = self.session
        if isinstance(session, FilterSession) and session.relay is not None:
            session.relay.abort()  # the upstream is gone: its open transaction must not finish
            session.relay = None
        super().connection_lost(error)

    def data_received(self, data: bytes) -> None:
        # An idle timeout rather than a per-command deadline: a large message arriving slowly
        # keeps the connection alive (RFC 5321 section 4.5.3.2.5 times each data block).
        if not self.working and self._timeout_handle is not None:
            self._reset_timeout()
        super().data_received(data)

    def _reset_timeout(self, duration: float | None = None) -> None:
        # Called for every command and every chunk of data: while the idle timer runs, only
        # note the time; the timer looks at it when it fires (cancelling and scheduling a
        # timer each time cost about 5% of the daemon's CPU).  A given duration (aiosmtpd's
        # PROXY wait) always starts a timer of its own.
        self._last_activity = self.loop.time()
        if duration is None and self._idle_timer and self._timeout_handle is not None:
            return
        if self._timeout_handle is not None:
            self._timeout_handle.cancel()
        self._idle_timer = duration is None
        self._timeout_handle = self.loop.call_later(
            duration or self._timeout_duration, self._timeout_cb
        )

    def _timeout_cb(self) -> None:
        if self._idle_timer:
            if self.working:  # busy(): the relay's own time limit
                until = self._busy_until
            else:  # idle: a full period after the last command, data or relay
                until = self._last_activity + self._timeout_duration
            left = until - self.loop.time()
            if left > 0:
                self._timeout_handle = self.loop.call_later(left, self._timeout_cb)
                return
        super()._timeout_cb()

    def _end_first_wait(self) -> None:
        if self._first_command_timer is not None:
            self._first_command_timer.cancel()
            self._first_command_timer = None

    def _no_first_command(self) -> None:
        self._first_command_timer = None
        if self.transport is None:
            return
        log.debug("%s: no first command in %ss", self._peer_host, self._first_command_timeout)
        self._connections.admission.first_command_timeouts += 1
        _close_with(self.transport, replies.NO_FIRST_COMMAND)

    @syntax("DATA")
    async def smtp_DATA(self, arg: str | None) -> None:
        """aiosmtpd's DATA, its checks, replies and handler call kept, with the message read
        to the lone dot in a few reads rather than line by line (daemon/smtp_data.py)."""
        if await self.check_helo_needed() or await self.check_auth_needed("DATA"):
            return
        if not self.envelope.rcpt_tos:
            await self.push("503 Error: need RCPT command")
            return
        if arg:
            await self.push("501 Syntax: DATA")
            return
        await self.push("354 End data with <CR><LF>.<CR><LF>")
        try:
            data = await read_data(self._reader, self.data_size_limit)
        except asyncio.CancelledError:  # aiosmtpd cancels the command when the client goes
            log.info("connection lost during DATA")
            self._writer.close()
            raise
        if data.content is None:
            # Read to the end first, then refused: RFC 5321 section 4.2.5 (aiosmtpd does too).
            self._set_post_data_state()
            await self.push(str(replies.MESSAGE_TOO_BIG))
            return
        self.envelope.content = self.envelope.original_content = data.content
        status = await self._call_handler_hook("DATA") if "DATA" in self._handle_hooks else MISSING
        self._set_post_data_state()
        await self.push("250 OK" if status is MISSING else status)

    @property
    def xforward_allowed(self) -> bool:
        """Whether this connection's client may send XFORWARD (and is offered it)."""
        address = site_policy.client_address(self._peer_host)
        return self._xforward_networks.find(address) is not None

    async def smtp_XFORWARD(self, arg: str | None) -> None:
        """XFORWARD NAME= ADDR= PROTO= HELO= SOURCE= (see daemon/xforward.py)."""
        if not self.xforward_allowed:
            await self.push(str(replies.XFORWARD_NOT_PERMITTED))
        elif not self.session.host_name:
            await self.push(str(replies.XFORWARD_NEEDS_EHLO))
        elif self.envelope.mail_from is not None:
            await self.push(str(replies.XFORWARD_IN_TRANSACTION))
        else:
            envelope: Any = self.envelope
            try:
                envelope.forwarded = xforward.parse(arg, envelope.forwarded)
            except xforward.XforwardError as exc:
                await self.push(str(exc.reply))
                return
            await self.push(str(replies.XFORWARD_OK))

    def _getaddr(self, arg: str) -> tuple[str | None, str | None]:
        plain = smtp_paths.plain_path(arg)
        if plain is None:
            return super()._getaddr(arg)
        local_part = plain[0].rpartition("@")[0]
        if self.local_part_limit and len(local_part) > self.local_part_limit:
            return None, None
        return plain

    def push(self, status: AnyStr) -> Coroutine[Any, Any, None]:
        # Not a coroutine itself: it hands back aiosmtpd's, one frame less on every reply.
        return super().push(_OWN_WORDING.get(status, status))

    @contextmanager
    def busy(self, seconds: float) -> Iterator[None]:
        """Keep the upstream connection open while we work for ``seconds`` at most (the idle
        timer would otherwise close it during a slow relay), then restart the idle period.
        The running idle timer reads both times when it fires; none is rescheduled here."""
        self._reset_timeout()
        self.working = True
        self._busy_until = self.loop.time() + max(seconds, self._timeout_duration)
        try:
            yield
        finally:
            self.working = False
            self._last_activity = self.loop.time()

    def forget_transaction(self) -> None:
        """Drop the envelope after a failed DATA, so the next MAIL starts clean."""
        self.envelope = self._create_envelope()


def _close_with(transport: asyncio.BaseTransport, reply: Reply) -> None:
    """Send a last reply (a 421: the server closes, RFC 5321 section 3.8) and close."""
    transport.write(str(reply).encode("ascii") + b"\r\n")  # type: ignore[attr-defined]
    transport.close()


def tls_context(smtp: SmtpSettings) -> ssl.SSLContext | None:
    """The server-side TLS context for STARTTLS, when a certificate and key are configured."""
    if smtp.tls_cert is None or smtp.tls_key is None:
        return None
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(str(smtp.tls_cert), str(smtp.tls_key))
    return context


async def create_smtp_server(
    settings: Settings,
    handler: FilterHandler,
    loop: asyncio.AbstractEventLoop | None = None,
    connections: Connections | None = None,
) -> asyncio.Server:
    """Bind the SMTP listener on the running loop (no threaded Controller).

    Pass ``connections`` to watch the open connections (``working`` tells when in-flight
    relays are done during a graceful shutdown; ``close_all`` ends the rest).
    """
    loop = loop or asyncio.get_running_loop()
    smtp = settings.smtp
    # aiosmtpd would look the name up on every connection; once is enough.
    hostname = smtp.hostname or await asyncio.to_thread(socket.getfqdn)
    connections = connections or Connections.from_settings(smtp)
    context = tls_context(smtp)
    # Parsed once for the server, not once per connection.
    xforward_networks = site_policy.Networks("smtp.xforward_networks", smtp.xforward_networks)

    def protocol() -> FilterSMTP:
        return FilterSMTP(
            handler,
            smtp=smtp,
            hostname=hostname,
            connections=connections,
            xforward_networks=xforward_networks,
            tls_context=context,
            loop=loop,
        )

    # A burst of connections beyond asyncio's default backlog (100) would wait in the kernel
    # for SYN-ACK retries (seconds to a minute) instead of getting their 220 or 421 at once.
    backlog = max(128, smtp.max_connections + smtp.max_connections // 2)
    return await loop.create_server(
        protocol, host=smtp.listen.host, port=smtp.listen.port, backlog=backlog
    )

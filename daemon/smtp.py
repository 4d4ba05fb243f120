"""The SMTP side: aiosmtpd receives, :class:`FilterHandler` judges, acts and relays.

One handler instance serves every connection and keeps no state of its own: the next-hop
client lives on the session (one per upstream connection), the transaction's relay state on
the envelope.  The upstream hears 250 for a message only after the next hop accepted it.
"""

from __future__ import annotations

import asyncio
import dataclasses
import functools
import logging
import socket
import ssl
import time
from collections.abc import Awaitable, Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, AnyStr, Protocol

from aiosmtpd.smtp import SMTP, Envelope, Session

from mailweir.daemon import actions, headers, replies, site_policy, xforward
from mailweir.daemon.admission import NO_FIRST_COMMAND, Admission
from mailweir.daemon.errors import NextHopUnavailable, RelayError, reply_for
from mailweir.daemon.judge import Judgement, new_tracking_id
from mailweir.daemon.log_setup import message_scoped, tag_message
from mailweir.daemon.relay import HEADER_ALLOWANCE, MailParameters, NextHopSession, RelayTimeouts
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import Settings, SmtpSettings
from mailweir.store.verdicts import VerdictRecord

log = logging.getLogger("mailweir.smtp")

# aiosmtpd words these replies itself, without enhanced codes.  With the line limit lifted to
# the message size limit, a line too long can only be a message too big.
_OWN_WORDING = {
    b"552 Error: Too much mail data": str(replies.MESSAGE_TOO_BIG),
    b"552 Error: message size exceeds fixed maximum message size": str(replies.MESSAGE_TOO_BIG),
    b"500 Line too long (see RFC5321 4.5.3.1.6)": str(replies.MESSAGE_TOO_BIG),
}


class JudgeLike(Protocol):
    async def judge(self, raw: bytes) -> Judgement: ...


class VerdictSink(Protocol):
    def add(self, record: Any) -> None: ...


class MetricsSink(Protocol):
    """The parts of daemon/metrics.py's ``Metrics`` the message path calls."""

    relay_seconds: Any  # a prometheus_client Histogram

    def message(self, band: str, action: str, score: float | None = None) -> None: ...
    def relay_error(self, error: RelayError) -> None: ...
    def scoring_failure(self) -> None: ...
    def listed(self, sender_list: str, action: str) -> None: ...


class Holding(Protocol):
    """daemon/quarantine.py's ``Quarantine``: the held copy of each rerouted message."""

    async def hold(
        self,
        raw: bytes,
        tracking_id: str,
        sender: str,
        recipients: Sequence[str],
        mail_options: Sequence[str],
        score: float | None,
        band: str,
    ) -> Reply | None: ...
    def let_go(self, tracking_id: str) -> None: ...


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

    @classmethod
    def from_settings(cls, smtp: SmtpSettings) -> Connections:
        return cls(smtp.max_connections, Admission.from_settings(smtp))

    @property
    def limit(self) -> int:
        return self.admission.limit

    def admit(self, protocol: FilterSMTP, host: str | None) -> Reply | None:
        """Count ``protocol`` in, or return the refusal to send before closing it."""
        refusal = self.admission.admit(host, self.active)
        if refusal is None:
            self.protocols.add(protocol)
        return refusal

    def release(self, protocol: FilterSMTP, host: str | None) -> None:
        if protocol in self.protocols:
            self.protocols.discard(protocol)
            self.admission.release(host)

    @property
    def active(self) -> int:
        return len(self.protocols)

    @property
    def working(self) -> int:
        """Connections in the middle of a relay (a RCPT or a DATA being passed on)."""
        return sum(1 for protocol in self.protocols if protocol.working)

    def close_all(self) -> None:
        for protocol in list(self.protocols):
            if protocol.transport is not None:
                protocol.transport.close()


class FilterSMTP(SMTP):
    """aiosmtpd's SMTP with the changes a filter in the mail path needs."""

    def __init__(
        self,
        handler: FilterHandler,
        *,
        smtp: SmtpSettings,
        hostname: str,
        connections: Connections,
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
        self._xforward_networks = site_policy.Networks(
            "smtp.xforward_networks", smtp.xforward_networks
        )
        self._counted = False
        self._refused = False
        self._peer_host: str | None = None
        self.working = False
        # A client that never sends a command is cut off after smtp.first_command_timeout;
        # the first command it sends (any verb aiosmtpd knows) ends that wait.
        self._first_command_timeout = smtp.first_command_timeout
        self._first_command_timer: asyncio.TimerHandle | None = None
        self._smtp_methods = {
            verb: self._ends_first_wait(method) for verb, method in self._smtp_methods.items()
        }

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
        super().connection_made(transport)

    def connection_lost(self, error: Exception | None) -> None:
        if self._refused:
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

    def _ends_first_wait(self, method: Callable[[str | None], Awaitable[None]]) -> Any:
        @functools.wraps(method)
        async def command(arg: str | None) -> None:
            self._end_first_wait()
            await method(arg)

        return command

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
        _close_with(self.transport, NO_FIRST_COMMAND)

    @property
    def xforward_allowed(self) -> bool:
        """Whether this connection's client may send XFORWARD (and is offered it)."""
        address = site_policy.client_address(self._peer_host)
        return self._xforward_networks.find(address) is not None

    async def smtp_XFORWARD(self, arg: str | None) -> None:
        """XFORWARD NAME= ADDR= PROTO= HELO= SOURCE= (see daemon/xforward.py)."""
        if not self.xforward_allowed:
            await self.push(str(xforward.NOT_PERMITTED))
        elif not self.session.host_name:
            await self.push(str(xforward.NEEDS_EHLO))
        elif self.envelope.mail_from is not None:
            await self.push(str(xforward.IN_TRANSACTION))
        else:
            envelope: Any = self.envelope
            try:
                envelope.forwarded = xforward.parse(arg, envelope.forwarded)
            except xforward.XforwardError as exc:
                await self.push(str(exc.reply))
                return
            await self.push(str(xforward.OK))

    async def push(self, status: AnyStr) -> None:
        raw = status if isinstance(status, bytes) else status.encode("utf-8", "surrogateescape")
        ours = _OWN_WORDING.get(raw)
        await (super().push(status) if ours is None else super().push(ours))

    @contextmanager
    def busy(self, seconds: float) -> Iterator[None]:
        """Keep the upstream connection open while we work for ``seconds`` at most (the idle
        timer would otherwise close it during a slow relay), then restart the idle timer."""
        self.working = True
        self._reset_timeout(max(seconds, self._timeout_duration))
        try:
            yield
        finally:
            self.working = False
            if self.transport is not None:
                self._reset_timeout()

    def forget_transaction(self) -> None:
        """Drop the envelope after a failed DATA, so the next MAIL starts clean."""
        self.envelope = self._create_envelope()


def _close_with(transport: asyncio.BaseTransport, reply: Reply) -> None:
    """Send a last reply (a 421: the server closes, RFC 5321 section 3.8) and close."""
    transport.write(str(reply).encode("ascii") + b"\r\n")  # type: ignore[attr-defined]
    transport.close()


class FilterHandler:
    """The aiosmtpd handler: relay in lock-step, judge at end of DATA, act, reply."""

    holding: Holding | None = None  # keeps rerouted mail for release; the service sets it

    def __init__(
        self,
        settings: Settings,
        judge: JudgeLike,
        verdict_log: VerdictSink | None = None,
        *,
        metrics: MetricsSink | None = None,
        helo_name: str | None = None,
    ) -> None:
        self.settings = settings
        self.judge = judge
        self.verdict_log = verdict_log
        self.metrics = metrics
        self.helo_name = (
            helo_name or settings.next_hop.helo_name or settings.smtp.hostname or socket.getfqdn()
        )
        self.timeouts = RelayTimeouts.from_settings(settings.next_hop)

    # -- hooks ------------------------------------------------------------------------------

    async def handle_RCPT(
        self,
        server: FilterSMTP,
        session: FilterSession,
        envelope: FilterEnvelope,
        address: str,
        rcpt_options: list[str],
    ) -> str:
        if len(envelope.rcpt_tos) >= self.settings.smtp.max_recipients:
            return str(replies.TOO_MANY_RECIPIENTS)
        if envelope.relay_failure is not None:
            return str(envelope.relay_failure)
        try:
            with server.busy(self._relay_seconds()):
                answer = await self._forward_recipient(session, envelope, address)
        except RelayError as exc:
            log.warning("next hop: %s", exc)
            if self.metrics is not None:
                self.metrics.relay_error(exc)
            if isinstance(exc, NextHopUnavailable) and session.relay is not None:
                session.relay.abort()  # the dialogue may be out of step; start afresh next time
            envelope.relay_failure = reply_for(exc)
            return str(envelope.relay_failure)
        if answer.is_positive:
            # A handle_RCPT hook must record the recipient itself (aiosmtpd's contract).
            envelope.rcpt_tos.append(address)
            envelope.rcpt_options.extend(rcpt_options)
        return str(answer)

    @message_scoped  # log lines from here to the reply carry the tracking id
    async def handle_DATA(
        self, server: FilterSMTP, session: FilterSession, envelope: FilterEnvelope
    ) -> str:
        received_at = time.time()
        try:
            with server.busy(self._relay_seconds() + self.settings.smtp.command_timeout):
                judgement, decision, action, reply = await self._judge_and_relay(session, envelope)
        except BaseException:
            if session.relay is not None:
                session.relay.abort()
            server.forget_transaction()
            raise
        self._record(judgement, decision, action, envelope, received_at)
        self._count(judgement, decision, action)
        return str(reply)

    async def handle_EHLO(
        self,
        server: FilterSMTP,
        session: FilterSession,
        envelope: FilterEnvelope,
        hostname: str,
        responses: list[str],
    ) -> list[str]:
        # aiosmtpd reads and answers commands strictly in order, which is all RFC 2920 asks
        # of a server, but does not say so; PIPELINING lets the upstream batch its commands.
        # AUTH is dropped: no authentication is configured, aiosmtpd would offer it after TLS.
        session.host_name = hostname
        offered = [line for line in responses[:-1] if not line.startswith("250-AUTH")]
        if server.xforward_allowed:
            offered.append(xforward.EHLO_LINE)
        return [*offered, "250-PIPELINING", responses[-1]]

    async def handle_RSET(
        self, server: FilterSMTP, session: FilterSession, envelope: FilterEnvelope
    ) -> str:
        if session.relay is not None:
            await session.relay.reset()
        return str(replies.RESET_OK)

    async def handle_QUIT(
        self, server: FilterSMTP, session: FilterSession, envelope: FilterEnvelope
    ) -> str:
        relay, session.relay = session.relay, None
        if relay is not None:
            await relay.close()
        return str(replies.CLOSING)

    async def handle_exception(self, error: Exception) -> str:
        # aiosmtpd awaits this hook; its default answers 500 with the exception text.
        log.error("error in SMTP session", exc_info=error)
        return str(replies.LOCAL_ERROR)

    # -- steps ------------------------------------------------------------------------------

    async def _forward_recipient(
        self, session: FilterSession, envelope: FilterEnvelope, address: str
    ) -> Reply:
        if session.relay is None:
            session.relay = NextHopSession(
                self.settings.next_hop.address, self.helo_name, self.timeouts
            )
        if not envelope.relay_open:
            params = MailParameters.from_options(envelope.mail_options)
            await session.relay.start(envelope.mail_from or "", params, HEADER_ALLOWANCE)
            envelope.relay_open = True
        return await session.relay.add_recipient(address)

    async def _decide(
        self, session: FilterSession, envelope: FilterEnvelope, raw: bytes
    ) -> tuple[Judgement, actions.Decision]:
        """Site policy first (a listed sender is not scored), then the score, per recipient."""
        policy = self.settings.policy  # one policy for the whole message, even across a reload
        site = site_policy.compiled(policy)
        views = [site.recipient_view(address) for address in envelope.rcpt_tos]
        hit = site.sender_hit(envelope.mail_from, xforward.upstream_client(session, envelope))
        if hit is not None:
            # Never scored, so never tokenized: no token hashes, nothing feedback could train.
            band: Any = actions.LISTED_BAND  # not one of the judge's bands: no score gave it
            judgement = Judgement(new_tracking_id(), band, None, (), None)
            decision = actions.decide_listed(hit, policy, any(view.exempt for view in views))
            log.info("%s: sender %s matched %s", judgement.tracking_id, envelope.mail_from, hit)
            return judgement, decision
        judgement = await self.judge.judge(headers.remove_own_fields(raw))
        decision = actions.decide_for_recipients(judgement.band, judgement.score, views, policy)
        return judgement, decision

    async def _judge_and_relay(
        self, session: FilterSession, envelope: FilterEnvelope
    ) -> tuple[Judgement, actions.Decision, str, Reply]:
        """Judge, act, relay; returns the judgement, the decision, the action taken for the
        log (the decided one, or "tempfail" / "refused" when the relay failed) and the reply."""
        raw = envelope.original_content or b""
        judgement, decision = await self._decide(session, envelope, raw)
        tag_message(judgement.tracking_id)
        if decision.note:
            log.info("%s: %s (%s)", judgement.tracking_id, decision.action, decision.note)
        relay = session.relay
        if relay is None:  # no RCPT reached the next hop; aiosmtpd normally prevents this
            return judgement, decision, "tempfail", replies.NEXT_HOP_LOST
        if decision.action == "reject":
            await relay.reset()
            return judgement, decision, "reject", actions.refusal(decision)
        if decision.action == "tempfail":
            await relay.reset()
            return judgement, decision, "tempfail", replies.SCORING_FAILED
        rerouted = decision.action == "reroute"
        fields = actions.tag_fields(
            decision.verdict,
            judgement.score,
            judgement.tracking_id,
            judgement.evidence,
            envelope.rcpt_tos if rerouted else (),
            decision.listed,
        )
        message = actions.render(raw, decision, fields)
        started = time.monotonic()
        sent = False
        try:
            if rerouted:
                refusal = await self._reroute(relay, envelope, len(message), judgement)
                if refusal is not None:
                    return judgement, decision, "tempfail", refusal
            answer = await relay.send(message)
            sent = True
        except RelayError as exc:
            log.warning("%s: next hop: %s", judgement.tracking_id, exc)
            if self.metrics is not None:
                self.metrics.relay_error(exc)
            reply = reply_for(exc)
            return judgement, decision, "tempfail" if reply.is_temporary else "refused", reply
        finally:
            if rerouted and not sent and self.holding is not None:
                # The upstream gets no 250 and sends the message again: a held copy of this
                # try would be a second copy of one message.
                self.holding.let_go(judgement.tracking_id)
            if self.metrics is not None:
                self.metrics.relay_seconds.observe(time.monotonic() - started)
        text = f"{answer.text} (mailweir id {judgement.tracking_id})".strip()
        return judgement, decision, decision.action, Reply(250, answer.enhanced or "2.0.0", text)

    async def _reroute(
        self, relay: NextHopSession, envelope: FilterEnvelope, size: int, judgement: Judgement
    ) -> Reply | None:
        """Keep the held copy (the bytes as they arrived), then replace the next-hop
        transaction's recipients by the quarantine mailbox.  None when ready to send, else
        the temporary refusal for the upstream."""
        if self.holding is not None:
            refusal = await self.holding.hold(
                envelope.original_content or b"",
                judgement.tracking_id,
                envelope.mail_from or "",
                envelope.rcpt_tos,
                envelope.mail_options,
                judgement.score,
                judgement.band,
            )
            if refusal is not None:
                await relay.reset()
                return refusal
        params = MailParameters.from_options(envelope.mail_options)
        await relay.start(envelope.mail_from or "", dataclasses.replace(params, size=size))
        answer = await relay.add_recipient(self.settings.policy.quarantine_mailbox)
        if not answer.is_positive:
            log.error("next hop refused the quarantine mailbox: %s", answer)
            await relay.reset()
            return replies.QUARANTINE_REFUSED
        return None

    def _relay_seconds(self) -> float:
        t = self.timeouts
        return t.connect + 4 * t.command + t.data

    def _count(self, judgement: Judgement, decision: actions.Decision, action: str) -> None:
        if self.metrics is None:
            return
        if decision.listed is not None:
            self.metrics.listed(decision.listed.list, action)
            return
        self.metrics.message(decision.band or judgement.band, action, judgement.score)
        if judgement.band == "failed":
            self.metrics.scoring_failure()

    def _record(
        self,
        judgement: Judgement,
        decision: actions.Decision,
        action: str,
        envelope: FilterEnvelope,
        received_at: float,
    ) -> None:
        """Hand the verdict to the log; it writes in the background, the reply never waits."""
        if self.verdict_log is None:
            return
        try:
            record = VerdictRecord(
                tracking_id=judgement.tracking_id,
                received_at=received_at,
                recipients=len(envelope.rcpt_tos),
                size=len(envelope.original_content or b""),
                score=judgement.score,
                band=decision.band or judgement.band,
                action=action,
                token_hashes=judgement.token_hashes,
                sender_list=decision.listed.list if decision.listed else None,
            )
            self.verdict_log.add(record)
        except Exception:
            log.exception("%s: verdict not recorded", judgement.tracking_id)


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

    def protocol() -> FilterSMTP:
        return FilterSMTP(
            handler,
            smtp=smtp,
            hostname=hostname,
            connections=connections,
            tls_context=context,
            loop=loop,
        )

    # A burst of connections beyond asyncio's default backlog (100) would wait in the kernel
    # for SYN-ACK retries (seconds to a minute) instead of getting their 220 or 421 at once.
    backlog = max(128, smtp.max_connections + smtp.max_connections // 2)
    return await loop.create_server(
        protocol, host=smtp.listen.host, port=smtp.listen.port, backlog=backlog
    )

"""The data path of one message: :class:`FilterHandler` relays, judges, acts and replies.

aiosmtpd (with the listener in daemon/smtp_server.py) receives; one handler instance serves
every connection and keeps no state of its own: the next-hop client lives on the session (one
per upstream connection), the transaction's relay state on the envelope.  The upstream hears
250 for a message only after the next hop accepted it.
"""

from __future__ import annotations

import dataclasses
import logging
import socket
import time
from collections.abc import Sequence
from typing import Any, Protocol

from mailweir.daemon import actions, headers, replies, site_policy, xforward
from mailweir.daemon.errors import NextHopUnavailable, RelayError, reply_for
from mailweir.daemon.judge import Judgement, new_tracking_id
from mailweir.daemon.log_setup import message_scoped, tag_message
from mailweir.daemon.relay import HEADER_ALLOWANCE, MailParameters, NextHopSession, RelayTimeouts
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import Settings
from mailweir.daemon.smtp_server import FilterEnvelope, FilterSession, FilterSMTP
from mailweir.store.verdicts import VerdictRecord

log = logging.getLogger("mailweir.smtp")


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
        # One line per message, as a mail server logs each delivery: what an admin greps for.
        log.info(
            "%s: from=<%s> recipients=%d size=%d band=%s score=%s action=%s reply=%d",
            judgement.tracking_id,
            envelope.mail_from or "",
            len(envelope.rcpt_tos),
            len(envelope.original_content or b""),
            decision.band or judgement.band,
            "-" if judgement.score is None else f"{judgement.score:.4f}",
            action,
            reply.code,
        )
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
            client = self._client_for_next_hop(session, envelope)
            await session.relay.start(envelope.mail_from or "", params, HEADER_ALLOWANCE, client)
            envelope.relay_open = True
        return await session.relay.add_recipient(address)

    def _client_for_next_hop(
        self, session: FilterSession, envelope: FilterEnvelope
    ) -> xforward.Forwarded | None:
        """Who the client was, for a next hop that offers XFORWARD (None: tell it nothing)."""
        if not self.settings.next_hop.send_xforward:
            return None
        return xforward.passed_on(session, envelope)

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
                client = self._client_for_next_hop(session, envelope)
                held_as = decision.verdict or judgement.band
                refusal = await self._reroute(
                    relay, envelope, len(message), judgement, held_as, client
                )
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
        self,
        relay: NextHopSession,
        envelope: FilterEnvelope,
        size: int,
        judgement: Judgement,
        held_as: str,
        client: xforward.Forwarded | None,
    ) -> Reply | None:
        """Keep the held copy (the bytes as they arrived), then replace the next-hop
        transaction's recipients by the quarantine mailbox.  None when ready to send, else
        the temporary refusal for the upstream.  ``held_as`` is the verdict that rerouted it
        (the band after the recipients' own cut-offs, or the sender list's verdict), which
        the held copy records and the digest shows."""
        if self.holding is not None:
            refusal = await self.holding.hold(
                envelope.original_content or b"",
                judgement.tracking_id,
                envelope.mail_from or "",
                envelope.rcpt_tos,
                envelope.mail_options,
                judgement.score,
                held_as,
            )
            if refusal is not None:
                await relay.reset()
                return refusal
        params = MailParameters.from_options(envelope.mail_options)
        await relay.start(
            envelope.mail_from or "", dataclasses.replace(params, size=size), client=client
        )
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

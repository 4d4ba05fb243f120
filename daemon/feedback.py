"""Feedback intake: corrections by mail and by HTTP, retrained exactly once.

One core, :class:`FeedbackIntake`, serves both channels.  Called with a
:class:`~mailweir.daemon.feedback_types.FeedbackRequest` it is the ``feedback`` callable the
HTTP side takes; :meth:`FeedbackIntake.receive_mail` is the mail channel's way in, and
:class:`FeedbackGate` puts it in front of the SMTP handler.

What gets trained: the tracking id (given, or the original's ``Mailweir-Id``) finds the
verdict record and its stored token hashes, so the retraining is exact however the forward
mangled the text.  Without an id, or when the hashes have expired, the recovered original is
tokenized.  The ledger (by :func:`~mailweir.model.hashing.message_digest`) makes a correction
of a message trained the other way a move and a repeat a no-op; only a correction that changed
the model is written to the feedback log and counted, so a second send counts once.

Who may train: SMTP clients in ``feedback.trusted_networks``.  mailweir sees only its direct
client; behind a mail server that is the server for all mail, so the server decides who may
write to the feedback addresses (deploy/postfix shows how).  There is no SMTP AUTH here.

An id taken from the message itself is checked against the message: when too few of the
original's tokens are among the verdict's hashes, the id belongs to another message (a sender
can write any ``Mailweir-Id`` into mail that passes in observe mode, where nothing is
stripped), so it is ignored and the original's own tokens are trained.
"""

from __future__ import annotations

import asyncio
import base64
import binascii
import collections
import concurrent.futures
import contextlib
import dataclasses
import functools
import logging
import time
from collections.abc import Awaitable, Callable, Sequence
from typing import Any, Final, Protocol

import numpy as np

from mailweir.daemon import forwarded, xforward
from mailweir.daemon.actions import ID_FIELD
from mailweir.daemon.feedback_types import (
    Correction,
    FeedbackOutcome,
    FeedbackRequest,
    FeedbackStatus,
)
from mailweir.daemon.log_setup import message_scoped, tag_message
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import FeedbackSettings
from mailweir.daemon.site_policy import Networks, client_address
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import TokenizerOptions, tokenize
from mailweir.model.types import HAM, SPAM, TokenHashes
from mailweir.store import FeedbackChannel, FeedbackKind, FeedbackRecord, TrainResult
from mailweir.store.errors import StoreError

log = logging.getLogger("mailweir.feedback")

# Share of the recovered original's tokens that must be among the verdict's hashes for an id
# read from the message to be believed.  Measured on the scenario's mail (test_feedback_core):
# an inline forward keeps 0.98 or more; junk against wanted mail shares at most 0.4.  Two
# messages from one template share up to 0.96, where the check cannot tell them apart and
# training one in place of the other is nearly the same correction.
MIN_ID_AGREEMENT: Final = 0.75
SPAM_BANDS: Final = ("spam", "suspect")
HOUR: Final = 3600.0
# An unknown id issued less than this long ago may sit in a verdict-log batch being written;
# the intake then waits up to VERDICT_WAIT seconds for it.
RECENT_ID_SECONDS: Final = 120.0
VERDICT_WAIT: Final = 5.0

# -- replies on the mail channel (RFC 5321 section 4.2 codes, RFC 3463 enhanced codes) -------
# X.1.5 "Destination address valid" (RFC 3463 section 3.2).
FEEDBACK_RECIPIENT_OK = Reply(250, "2.1.5", "Feedback address ok")
# 550 "rejected for policy reasons" (RFC 5321 section 4.2.3); X.7.1 "Delivery not
# authorized, message refused" (RFC 3463 section 3.8).
UNTRUSTED = Reply(550, "5.7.1", "Feedback is accepted only from trusted networks")
# 452 and X.5.3 "Too many recipients" (RFC 5321 section 4.5.3.1.10, RFC 3463 section 3.6):
# temporary on purpose.  A client that gets 452 for a recipient retries it in a later
# transaction, so the mail server splits the feedback copy from the ordinary ones by itself;
# a 5xx would bounce a user's forward that merely had a colleague in Cc.
MIXED = Reply(452, "4.5.3", "A feedback address takes no other recipients; send them separately")
# 451 "local error" (RFC 5321 section 4.2.3) with X.7.1 as a temporary refusal; a rate limit
# has no code of its own in RFC 3463 (common practice, no source).
RATE_LIMITED = Reply(451, "4.7.1", "Too many corrections from this sender, try again later")
# 552 and X.3.4 "Message too big for system" (RFC 3463 section 3.4).
TOO_BIG = Reply(552, "5.3.4", "Feedback message too big")
# 554 "Transaction failed" (RFC 5321 section 4.2.3), X.6.0 "Other or undefined media error"
# (RFC 3463 section 3.7): the content holds no message to learn from.  The bounce tells the
# user what to do.
NO_ORIGINAL = Reply(
    554, "5.6.0", "No misfiled message found: forward it as an attachment, or redirect it"
)
# 550 "rejected for policy reasons" (RFC 5321 section 4.2.3), X.7.1 (RFC 3463 section 3.8):
# a sender list of the site policy decided the message, so the model has nothing to learn.
LISTED = Reply(550, "5.7.1", "Not trained: the site's sender list decided it; ask the mail admin")
# 451 and X.3.0 (RFC 3463 section 3.4): the store failed; the mail server retries, and the
# ledger makes the retry harmless for whatever was already stored.
NOT_STORED = Reply(451, "4.3.0", "Correction not stored, try again later")


class MetricsLike(Protocol):
    def feedback(self, kind: str) -> None: ...
    def feedback_refused(self, reason: str) -> None: ...


def hashes_of(raw: bytes, options: TokenizerOptions) -> TokenHashes:
    """The message's token hashes (module level, so a process pool can run it)."""
    return tokenize(raw, options)


def issued_at(tracking_id: str) -> float | None:
    """Unix time in a tracking id of ours (48 bits of milliseconds first, base32hex, see
    ``judge.new_tracking_id``); None for an id of another shape."""
    if len(tracking_id) != 16:
        return None
    try:
        raw = base64.b32hexdecode(tracking_id.upper())
    except (ValueError, binascii.Error):
        return None
    return int.from_bytes(raw[:6], "big") / 1000.0


def kind_of(correction: Correction, band: str | None) -> FeedbackKind:
    """False positive: judged spam or suspect, sent back as wanted; false negative: judged
    ham, sent back as spam; anything else (agreement, no verdict) is a confirmation."""
    if correction == "ham" and band in SPAM_BANDS:
        return FeedbackKind.FALSE_POSITIVE
    if correction == "spam" and band == "ham":
        return FeedbackKind.FALSE_NEGATIVE
    return FeedbackKind.CONFIRMATION


def agreement(original: TokenHashes, recorded: TokenHashes) -> float:
    """Share of ``original``'s hashes found among ``recorded`` (both sorted, unique)."""
    if not len(original):
        return 0.0
    return float(np.isin(original, recorded, assume_unique=True).mean())


class TrustedNetworks:
    """Client addresses allowed to train, from CIDR texts."""

    def __init__(self, networks: Sequence[str]) -> None:
        self._networks = Networks("feedback.trusted_networks", networks)

    def __contains__(self, peer: object) -> bool:
        """``peer`` as aiosmtpd gives it: ``(host, port, ...)``, or a bare host text; a Unix
        socket or no address at all is not a network client."""
        return self._networks.find(client_address(peer)) is not None


class RateLimit:
    """At most ``per_hour`` events per key in any sliding hour (0: unlimited)."""

    def __init__(self, per_hour: int, clock: Callable[[], float] = time.monotonic) -> None:
        self.per_hour = per_hour
        self._clock = clock
        self._events: dict[str, collections.deque[float]] = {}

    def allows(self, key: str) -> bool:
        if not self.per_hour:
            return True
        events = self._events.get(key)
        if events is None:
            return True
        self._forget(events)
        return len(events) < self.per_hour

    def take(self, key: str) -> bool:
        """Record one event unless the key is over its limit; True when recorded."""
        if not self.allows(key):
            return False
        if self.per_hour:
            self._events.setdefault(key, collections.deque()).append(self._clock())
            if len(self._events) > 10_000:  # senders seen once long ago; keep memory bounded
                self._events = {k: v for k, v in self._events.items() if self._forget(v)}
        return True

    def _forget(self, events: collections.deque[float]) -> int:
        horizon = self._clock() - HOUR
        while events and events[0] <= horizon:
            events.popleft()
        return len(events)


class FeedbackIntake:
    """Turns corrections into training, ledger moves, feedback-log rows and metrics."""

    # After an accepted "ham" correction with a known tracking id: release that message's held
    # copy, if the quarantine has one (daemon/quarantine.py's ``release_wanted``; the service
    # sets it), told whether the verdict rerouted it.  Returns a sentence for the reply, or
    # None when there is nothing to say.
    release_wanted: Callable[[str, bool], Awaitable[str | None]] | None = None

    def __init__(
        self,
        store: Any,
        settings: FeedbackSettings,
        options: TokenizerOptions,
        metrics: MetricsLike | None = None,
        *,
        verdict_log: Any = None,
        executor: concurrent.futures.Executor | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        """``options`` must be the model's own tokenizer options (the judge's), or the hashes
        would miss every count.  ``verdict_log`` is flushed when a tracking id is not found
        yet, for feedback that overtakes the batched verdict writes."""
        self._store = store
        self.settings = settings
        self._options = options
        self._metrics = metrics
        self._verdict_log = verdict_log
        self._executor = executor
        self._clock = clock
        self.trusted = TrustedNetworks(settings.trusted_networks)
        self.rate_limit = RateLimit(settings.rate_limit_per_hour)
        self._addresses: dict[str, Correction] = {}
        for address, correction in ((settings.spam_address, "spam"), (settings.ham_address, "ham")):
            if address:
                self._addresses[address.lower()] = correction  # type: ignore[assignment]

    def correction_for(self, address: str) -> Correction | None:
        """What mail to ``address`` says, or None for an ordinary recipient."""
        return self._addresses.get(address.strip().strip("<>").lower())

    # -- the core ------------------------------------------------------------------------------

    async def __call__(self, request: FeedbackRequest) -> FeedbackOutcome:
        """Store one correction.  Raises only a store error, and then nothing changed.

        A tracking id given in the request is taken as is (the HTTP side's caller holds the
        token); one read from the message is checked against the message."""
        outcome = await self._correct(request, check_id=request.tracking_id is None)
        note = await self._release_if_wanted(request, outcome)
        return dataclasses.replace(outcome, detail=f"{outcome.detail}; {note}") if note else outcome

    async def _release_if_wanted(
        self, request: FeedbackRequest, outcome: FeedbackOutcome
    ) -> str | None:
        """Retrain and release in one step: a wanted-mail correction frees the held copy."""
        hook = self.release_wanted
        if hook is None or request.correction != "ham" or not outcome.accepted:
            return None
        # outcome.tracking_id is set only for a verdict found (and, for an id read from the
        # message, believed): nobody releases another message by writing its id.
        return await hook(outcome.tracking_id, outcome.rerouted) if outcome.tracking_id else None

    @message_scoped  # the lines about this correction carry its tracking id
    async def _correct(self, request: FeedbackRequest, *, check_id: bool) -> FeedbackOutcome:
        verdict, hashes, exact = await self._evidence(request, check_id)
        if verdict is not None and verdict.sender_list:
            # The site's sender list decided it, not the model: a correction is for the list.
            self._refused("listed")
            detail = f"decided by the {verdict.sender_list} list of the site policy; not trained"
            log.info("feedback on %s refused: %s", verdict.tracking_id, detail)
            return FeedbackOutcome(FeedbackStatus.REFUSED, detail, None, verdict.tracking_id)
        if hashes is None or not len(hashes):
            self._refused("no_original")
            detail = (
                "no message came and the verdict log has no tokens for this id "
                "(unknown, or past log.verdict_retention_days)"
                if request.raw is None
                else "the message has no tokens to learn from"
            )
            return FeedbackOutcome(FeedbackStatus.NO_ORIGINAL, detail, None, request.tracking_id)
        tracking_id = None if verdict is None else verdict.tracking_id
        kind = kind_of(request.correction, None if verdict is None else verdict.band)
        channel = FeedbackChannel(request.channel)
        record = FeedbackRecord(kind, channel, self._clock(), tracking_id, message_digest(hashes))
        label = SPAM if request.correction == "spam" else HAM
        result = await asyncio.to_thread(self._store_correction, hashes, label, record, request)
        outcome = self._outcome(result, kind, tracking_id, exact)
        rerouted = verdict is not None and verdict.action == "reroute"
        return dataclasses.replace(outcome, rerouted=rerouted) if rerouted else outcome

    async def _evidence(
        self, request: FeedbackRequest, check_id: bool
    ) -> tuple[Any, TokenHashes | None, bool]:
        """The verdict record (None when unknown or not believed), the hashes to train and
        whether they are the verdict's own (exact)."""
        tracking_id = request.tracking_id
        if tracking_id is None and request.raw is not None:
            tracking_id = forwarded.tracking_id(request.raw)
        tag_message(tracking_id)
        verdict = await self._find_verdict(tracking_id) if tracking_id else None
        recorded = None if verdict is None else verdict.token_hashes
        hashes = None
        if request.raw is not None:
            work = functools.partial(hashes_of, request.raw, self._options)
            hashes = await asyncio.get_running_loop().run_in_executor(self._executor, work)
        if recorded is not None and hashes is not None and check_id:
            share = agreement(hashes, recorded)
            if share < MIN_ID_AGREEMENT:
                log.warning(
                    "feedback from %s: %s names %s but shares only %.0f%% of its tokens; "
                    "training the message's own tokens",
                    request.client,
                    ID_FIELD,
                    tracking_id,
                    100 * share,
                )
                return None, hashes, False
        if recorded is not None:
            return verdict, recorded, True  # exact: the tokens the message was judged on
        return verdict, hashes, False

    async def _find_verdict(self, tracking_id: str) -> Any:
        """The verdict record, waiting briefly for one the verdict log has not written yet
        (it writes in batches, so feedback can overtake it: queued records are flushed, and
        a batch already being written is waited for when the id was issued moments ago)."""
        deadline = time.monotonic() + VERDICT_WAIT
        while True:
            verdict = await asyncio.to_thread(self._store.find_verdict, tracking_id)
            if verdict is not None or self._verdict_log is None:
                return verdict
            # Bounded by the deadline too: a flush that keeps failing (a locked database)
            # leaves records pending, and the correction must get its 451 rather than spin.
            if self._verdict_log.pending and time.monotonic() < deadline:
                await self._verdict_log.flush()
                continue
            issued = issued_at(tracking_id)
            recent = issued is not None and self._clock() - issued < RECENT_ID_SECONDS
            if not recent or time.monotonic() >= deadline:
                return None
            await asyncio.sleep(0.02)

    def _store_correction(
        self, hashes: TokenHashes, label: int, record: FeedbackRecord, request: FeedbackRequest
    ) -> TrainResult:
        """Worker thread: the training and its log row commit together or not at all."""
        with self._store.transaction():
            result: TrainResult = self._store.train(
                hashes, label, digest=record.digest, source=f"feedback:{request.channel}"
            )
            if result in (TrainResult.TRAINED, TrainResult.MOVED):
                self._store.record_feedback(record)
        return result

    def _outcome(
        self, result: TrainResult, kind: FeedbackKind, tracking_id: str | None, exact: bool
    ) -> FeedbackOutcome:
        how = "from the verdict's stored tokens" if exact else "from the message's tokens"
        if result is TrainResult.ALREADY_KNOWN:
            detail = "this correction was stored before; nothing changed"
            return FeedbackOutcome(FeedbackStatus.ALREADY_KNOWN, detail, kind.value, tracking_id)
        if self._metrics is not None:
            self._metrics.feedback(kind.value)
        if result is TrainResult.MOVED:
            detail = f"moved to the other class {how} ({kind.value})"
            return FeedbackOutcome(FeedbackStatus.MOVED, detail, kind.value, tracking_id)
        detail = f"trained {how} ({kind.value})"
        return FeedbackOutcome(FeedbackStatus.TRAINED, detail, kind.value, tracking_id)

    def _refused(self, reason: str) -> None:
        if self._metrics is not None:
            self._metrics.feedback_refused(reason)

    # -- the mail channel ----------------------------------------------------------------------

    def screen_recipient(
        self,
        peer: object,
        sender: str | None,
        options: Sequence[str],
        taken: Sequence[str],
        address: str,
    ) -> Reply | None:
        """The RCPT answer when ``address`` or the transaction is about feedback; None for an
        ordinary recipient in an ordinary transaction (the filter path takes it)."""
        correction = self.correction_for(address)
        feedback_so_far = [self.correction_for(a) is not None for a in taken]
        if correction is None:
            return MIXED if any(feedback_so_far) else None
        if taken:
            return MIXED  # one feedback address per transaction, and nothing else with it
        if peer not in self.trusted:
            log.warning("feedback to %s from untrusted client %s refused", address, peer)
            self._refused("untrusted")
            return UNTRUSTED
        if _declared_size(options) > self.settings.max_message_bytes:
            self._refused("invalid")
            return TOO_BIG
        if not self.rate_limit.allows(_sender_key(sender)):
            self._refused("rate_limited")
            return RATE_LIMITED
        return FEEDBACK_RECIPIENT_OK

    def is_feedback(self, recipients: Sequence[str]) -> bool:
        return any(self.correction_for(a) is not None for a in recipients)

    async def receive_mail(
        self, peer: object, sender: str | None, recipients: Sequence[str], raw: bytes
    ) -> Reply:
        """End of DATA for a feedback transaction: the reply, 250 only once stored."""
        corrections = [c for c in map(self.correction_for, recipients) if c is not None]
        if peer not in self.trusted:  # screened at RCPT already; checked again all the same
            self._refused("untrusted")
            return UNTRUSTED
        if len(raw) > self.settings.max_message_bytes:
            self._refused("invalid")
            return TOO_BIG
        if not self.rate_limit.take(_sender_key(sender)):
            self._refused("rate_limited")
            return RATE_LIMITED
        originals = await asyncio.to_thread(forwarded.find_originals, raw)
        if not originals:
            self._refused("no_original")
            return NO_ORIGINAL
        client = sender or "<>"
        outcomes: list[FeedbackOutcome] = []
        notes: list[str] = []
        try:
            for original in originals:
                request = FeedbackRequest(
                    corrections[0], "mail", original.tracking_id, original.raw, client
                )
                outcomes.append(await self._correct(request, check_id=True))
                note = await self._release_if_wanted(request, outcomes[-1])
                notes += [note] if note else []
        except StoreError as exc:
            log.warning("feedback from %s not stored: %s", client, exc)
            return NOT_STORED
        reply = _summary(outcomes, [o.form for o in originals], notes)
        log.info("feedback from %s (%s): %s -> %s", client, peer, corrections[0], reply.text)
        return reply


def _summary(outcomes: list[FeedbackOutcome], forms: list[str], notes: list[str]) -> Reply:
    accepted = [o for o in outcomes if o.accepted]
    if not accepted:
        listed = any(o.status is FeedbackStatus.REFUSED for o in outcomes)
        return LISTED if listed else NO_ORIGINAL
    counts = collections.Counter(o.status.value for o in accepted)
    parts = ", ".join(f"{n} {status.replace('_', ' ')}" for status, n in sorted(counts.items()))
    ids = ", ".join(o.tracking_id for o in accepted if o.tracking_id) or "no tracking id"
    text = f"Correction stored: {parts} ({'/'.join(sorted(set(forms)))}; {ids})"
    text += "".join(f"; {note}" for note in notes)
    return Reply(250, "2.0.0", text)


def _sender_key(sender: str | None) -> str:
    return (sender or "").strip().strip("<>").lower()


def _declared_size(options: Sequence[str]) -> int:
    """The SIZE the client declared at MAIL (RFC 1870 section 6), 0 when none."""
    for option in options:
        name, _, value = option.partition("=")
        if name.upper() == "SIZE" and value.isdigit():
            return int(value)
    return 0


class FeedbackGate:
    """The SMTP handler seen through: feedback transactions are answered here, every other
    transaction goes to the wrapped handler untouched.

    Whether a transaction is about feedback follows from its accepted recipients alone, so
    the gate keeps no state of its own (one instance serves every connection, like the
    handler it wraps).  A feedback transaction never opens a next-hop connection.
    """

    def __init__(self, handler: Any, intake: FeedbackIntake, busy_seconds: float = 300.0) -> None:
        self.handler = handler
        self.intake = intake
        self._busy_seconds = busy_seconds

    def __getattr__(self, name: str) -> Any:
        return getattr(self.handler, name)

    def __dir__(self) -> list[str]:
        # aiosmtpd finds hooks with dir(handler): every hook of the wrapped handler must show.
        return sorted(set(super().__dir__()) | set(dir(self.handler)))

    async def handle_RCPT(
        self, server: Any, session: Any, envelope: Any, address: str, rcpt_options: list[str]
    ) -> str:
        client = xforward.upstream_client(session, envelope)
        answer = self.intake.screen_recipient(
            client, envelope.mail_from, envelope.mail_options, envelope.rcpt_tos, address
        )
        if answer is None:
            return str(
                await self.handler.handle_RCPT(server, session, envelope, address, rcpt_options)
            )
        if answer.is_positive:
            # A handle_RCPT hook must record the recipient itself (aiosmtpd's contract).
            envelope.rcpt_tos.append(address)
            envelope.rcpt_options.extend(rcpt_options)
        return str(answer)

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        if not self.intake.is_feedback(envelope.rcpt_tos):
            return str(await self.handler.handle_DATA(server, session, envelope))
        busy = getattr(server, "busy", None)
        keep_open = busy(self._busy_seconds) if busy else contextlib.nullcontext()
        try:
            with keep_open:
                reply = await self.intake.receive_mail(
                    xforward.upstream_client(session, envelope),
                    envelope.mail_from,
                    envelope.rcpt_tos,
                    envelope.original_content or b"",
                )
        except Exception:
            log.exception("feedback from %s failed", envelope.mail_from)
            reply = NOT_STORED
        return str(reply)

    def reload(self, settings: Any) -> None:
        if hasattr(self.handler, "reload"):
            self.handler.reload(settings)
        else:
            self.handler.settings = settings

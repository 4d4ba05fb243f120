"""The digest of held mail: a plain-text mail listing what the quarantine kept in the last day.

With ``quarantine.digest_to = "recipients"`` each original recipient gets a digest of the
messages held for them alone; with ``"admin"`` one digest of everything goes to
``quarantine.digest_admin``.  Each entry gives the sender, the decoded subject, the score, when
it was held and the tracking id, and the ways to release it.  Nobody gets an empty digest, and
released messages are left out.

The mail is RFC 5322 (Date, Message-ID, From, To, Subject; a non-ASCII subject becomes an
RFC 2047 encoded word) with ``Auto-Submitted: auto-generated`` (RFC 3834 section 5), sent
through the next hop from ``quarantine.digest_from``.  :class:`DigestSchedule` sends it daily at
``quarantine.digest_time``; ``mailweir digest`` does it by hand.
"""

from __future__ import annotations

import asyncio
import datetime
import email.policy
import email.utils
import logging
import secrets
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from email.message import EmailMessage
from email.parser import BytesHeaderParser
from typing import Final

from mailweir.daemon.background import stop_task
from mailweir.daemon.config import digest_clock
from mailweir.daemon.errors import RelayError
from mailweir.daemon.quarantine import Quarantine
from mailweir.daemon.relay import MailParameters, NextHopSession
from mailweir.daemon.settings import Settings
from mailweir.store.held_mail import HeldEnvelope

log = logging.getLogger("mailweir.digest")

DAY: Final = 86400.0
SUBJECT_MAX: Final = 120  # characters of a held message's subject shown in the listing
TIME_FORMAT: Final = "%Y-%m-%d %H:%M %Z"


@dataclass(frozen=True)
class DigestMail:
    recipient: str
    raw: bytes  # CRLF line endings, ready for DATA
    tracking_ids: tuple[str, ...]


@dataclass(frozen=True)
class Listed:
    """One held message as a digest shows it."""

    envelope: HeldEnvelope
    subject: str


def subject_of(raw: bytes) -> str:
    """The decoded Subject (RFC 2047) of a held message, shortened; never raises."""
    try:
        head = raw[:65536].split(b"\r\n\r\n", 1)[0]
        message = BytesHeaderParser(policy=email.policy.default).parsebytes(head)
        text = " ".join(str(message.get("Subject", "") or "").split())
    except Exception:  # a damaged header must not stop the digest (the stdlib raises odd types)
        return "(subject unreadable)"
    text = text or "(no subject)"
    return text if len(text) <= SUBJECT_MAX else text[: SUBJECT_MAX - 3] + "..."


def gather(quarantine: Quarantine, now: float, hours: float = 24.0) -> list[Listed]:
    """Held, unreleased messages held in the ``hours`` before ``now``, oldest first."""
    since = now - hours * 3600.0
    listed = []
    for envelope in quarantine.store.envelopes():
        if envelope.released or not (since < envelope.held_at <= now):
            continue
        try:
            subject = subject_of(quarantine.store.head(envelope.tracking_id))
        except Exception:
            subject = "(held copy unreadable)"
        listed.append(Listed(envelope, subject))
    return listed


def compose(settings: Settings, listed: Sequence[Listed], now: float) -> list[DigestMail]:
    """One digest mail per reader (each original recipient, or the admin)."""
    q = settings.quarantine
    groups: dict[str, tuple[str, list[Listed]]] = {}
    for item in listed:
        readers = [q.digest_admin] if q.digest_to == "admin" else item.envelope.recipients
        for reader in readers:
            groups.setdefault(reader.lower(), (reader, []))[1].append(item)
    return [_mail(settings, reader, items, now) for reader, items in groups.values()]


def _mail(settings: Settings, reader: str, items: list[Listed], now: float) -> DigestMail:
    q = settings.quarantine
    message = EmailMessage(policy=email.policy.SMTP)
    message["Date"] = email.utils.formatdate(now, localtime=True)
    message["From"] = q.digest_from
    message["To"] = reader
    count = f"{len(items)} message{'s' if len(items) != 1 else ''}"
    message["Subject"] = f"Held mail: {count} kept for you in the last day"
    # RFC 5322 section 3.6.4; short enough that the field needs no folding.
    domain = q.digest_from.rpartition("@")[2]
    message["Message-ID"] = f"<digest.{int(now)}.{secrets.token_hex(6)}@{domain}>"
    message["Auto-Submitted"] = "auto-generated"  # RFC 3834 section 5: no automatic replies
    message.set_content(_text(settings, items), cte="quoted-printable")
    ids = tuple(item.envelope.tracking_id for item in items)
    return DigestMail(reader, message.as_bytes(), ids)


def _text(settings: Settings, items: list[Listed]) -> str:
    lines = [
        "These messages were judged unwanted and held back instead of being delivered.",
        "If one of them is mail you wanted, release it (each way below works once).",
        "",
    ]
    for number, item in enumerate(items, 1):
        e = item.envelope
        when = datetime.datetime.fromtimestamp(e.held_at).astimezone().strftime(TIME_FORMAT)
        score = "not scored" if e.score is None else f"{e.score:.4f}"
        lines += [
            f"{number}. {item.subject}",
            f"   From:        {e.sender or '<> (a bounce)'}",
            f"   Held at:     {when}",
            f"   Score:       {score} ({e.band or 'unknown band'})",
            f"   Tracking id: {e.tracking_id}",
            *(f"   {line}" for line in release_ways(settings, e.tracking_id)),
            "",
        ]
    return "\n".join(lines)


def release_ways(settings: Settings, tracking_id: str) -> list[str]:
    """How to release one held message, as lines for people (short enough that
    quoted-printable never breaks them)."""
    pad = " " * 13
    ways = [f"Release:     mailweir release {tracking_id}  (mail admin, on the filter)"]
    ham, mailbox = settings.feedback.ham_address, settings.policy.quarantine_mailbox
    if ham:
        ways.append(f"{pad}or forward its copy in {mailbox or 'the quarantine mailbox'}")
        ways.append(f"{pad}  as an attachment to {ham}")
    if settings.http.token:
        ways.append(f"{pad}or POST, with the HTTP bearer token, to")
        ways.append(f"{pad}  http://{settings.http.listen}/quarantine/{tracking_id}/release")
    return ways


async def send(quarantine: Quarantine, mails: Sequence[DigestMail]) -> int:
    """Send each digest through the next hop; how many the next hop accepted.

    A failure is logged and the other digests still go; the held mail itself is untouched.
    """
    settings = quarantine.settings
    sent = 0
    for mail in mails:
        relay = NextHopSession(
            settings.next_hop.address, quarantine.helo_name(), quarantine.timeouts()
        )
        try:
            await relay.start(settings.quarantine.digest_from, MailParameters(len(mail.raw)))
            answer = await relay.add_recipient(mail.recipient)
            if not answer.is_positive:
                log.warning("digest for %s refused by the next hop: %s", mail.recipient, answer)
                continue
            await relay.send(mail.raw)
        except RelayError as exc:
            log.warning("digest for %s not sent: %s", mail.recipient, exc)
            continue
        finally:
            await relay.close()
        sent += 1
        await asyncio.to_thread(quarantine.store.count_digest)
        log.info("digest sent to %s listing %s", mail.recipient, ", ".join(mail.tracking_ids))
    return sent


async def run_once(quarantine: Quarantine, now: float) -> tuple[list[DigestMail], int]:
    """Gather, compose and send the digests for the day before ``now``."""
    listed = await asyncio.to_thread(gather, quarantine, now)
    mails = compose(quarantine.settings, listed, now)
    return mails, await send(quarantine, mails)


def next_run(clock: str, now: float) -> float:
    """Unix time of the next ``HH:MM`` in local time strictly after ``now``.

    mktime with isdst=-1 finds each day's own offset, so a change to or from summer time
    keeps the local hour."""
    hour, minute = digest_clock(clock) or (0, 0)
    today = time.localtime(now)
    for days in range(3):
        parts = (today.tm_year, today.tm_mon, today.tm_mday + days, hour, minute, 0, 0, 0, -1)
        stamp = time.mktime(parts)
        if stamp > now:
            return stamp
    raise AssertionError("unreachable: a day later is always after now")


class DigestSchedule:
    """Sends the digest daily at ``quarantine.digest_time``, inside the daemon."""

    def __init__(self, quarantine: Quarantine, clock: Callable[[], float]) -> None:
        self.quarantine = quarantine
        self._clock = clock
        self._task: asyncio.Task[None] | None = None

    def start(self) -> None:
        if self._task is None and self.quarantine.settings.quarantine.digest_time:
            self._task = asyncio.create_task(self._run(), name="mailweir-digest")

    async def stop(self) -> None:
        await stop_task(self._task)
        self._task = None

    async def _run(self) -> None:
        due = next_run(self.quarantine.settings.quarantine.digest_time, self._clock())
        while True:
            # Short naps, so a clock change (or a suspended machine) moves the send with it.
            await asyncio.sleep(min(max(due - self._clock(), 0.0), 300.0))
            if self._clock() < due:
                continue
            try:
                mails, sent = await run_once(self.quarantine, self._clock())
                log.info("daily digest: %d of %d sent", sent, len(mails))
            except Exception:
                log.exception("daily digest failed; the next one is tomorrow")
            due = next_run(self.quarantine.settings.quarantine.digest_time, self._clock())

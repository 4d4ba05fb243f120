"""The quarantine: a held copy of every rerouted message, and its release.

When the policy reroutes a message to ``policy.quarantine_mailbox``, the SMTP handler first
asks :meth:`Quarantine.hold` to keep the message exactly as it arrived (before our header
fields) with its envelope, in ``<state_dir>/quarantine`` (``store/held_mail.py``).  Only then
does it relay, and only after the next hop accepted does the upstream hear 250.  A copy that
cannot be written makes the message a temporary failure (451): the upstream keeps it and
retries, so no rerouted message ever exists without its held copy.  A copy whose relay failed
is deleted again, since the upstream will send the message anew.

:meth:`Quarantine.release` sends the held bytes, unchanged, to the original recipients through
the next hop, from the original envelope sender.  Three ways lead there: ``mailweir release``,
``POST /quarantine/<id>/release`` and a correction to the wanted-mail feedback address.  A
message is released once; the held copy's sidecar records when, how and to whom.
"""

from __future__ import annotations

import asyncio
import logging
import socket
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Final

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from mailweir.daemon import replies
from mailweir.daemon.errors import RelayError
from mailweir.daemon.relay import MailParameters, NextHopSession, RelayTimeouts
from mailweir.daemon.replies import Reply
from mailweir.daemon.settings import Settings
from mailweir.store.held_mail import (
    RELEASE_WAYS,
    AlreadyReleased,
    HeldEnvelope,
    HeldMailError,
    HeldMailStore,
    NotHeld,
)

log = logging.getLogger("mailweir.quarantine")

FOLDER: Final = "quarantine"


class ReleaseFailed(HeldMailError):
    """The next hop did not take the released message; nothing was recorded, try again."""


def quarantine_folder(settings: Settings) -> Path:
    return settings.state_dir / FOLDER


class Quarantine:
    """Holding and releasing; the daemon and the commands each make one."""

    def __init__(self, settings: Settings, store: HeldMailStore | None = None) -> None:
        self.settings = settings
        self.store = store or HeldMailStore(quarantine_folder(settings))
        self.hold_failures = 0

    # -- holding (the SMTP handler's reroute) ------------------------------------------------

    async def hold(
        self,
        raw: bytes,
        tracking_id: str,
        sender: str,
        recipients: Sequence[str],
        mail_options: Sequence[str],
        score: float | None,
        band: str,
    ) -> Reply | None:
        """Keep the message; None when it is safely on disk, else the reply to give (451)."""
        params = MailParameters.from_options(mail_options)
        envelope = HeldEnvelope(
            tracking_id=tracking_id,
            sender=sender,
            recipients=tuple(recipients),
            held_at=time.time(),
            size=len(raw),
            score=score,
            band=band,
            eight_bit=params.eight_bit,
            smtputf8=params.smtputf8,
        )
        try:
            await asyncio.to_thread(self.store.hold, raw, envelope)
        except (OSError, HeldMailError) as exc:
            self.hold_failures += 1
            log.error("%s: held copy not written (%s); answering 451", tracking_id, exc)
            return replies.HOLD_FAILED
        log.info("%s: held for %s", tracking_id, ", ".join(recipients))
        return None

    def let_go(self, tracking_id: str) -> None:
        """Drop the held copy of a reroute whose relay failed (the upstream sends it again).

        Blocking, on purpose: it also runs while a cancelled transaction unwinds, and it is
        two unlinks."""
        try:
            self.store.forget(tracking_id)
        except OSError as exc:
            log.warning("%s: unsent held copy not removed: %s", tracking_id, exc)

    # -- releasing ---------------------------------------------------------------------------

    async def release(self, tracking_id: str, way: str) -> HeldEnvelope:
        """Send the held message to its original recipients; the recorded envelope.

        Raises :class:`NotHeld`, :class:`AlreadyReleased`, ``ReleaseUnderway`` or
        :class:`ReleaseFailed`; each message says what happened and what to do.
        """
        envelope = await asyncio.to_thread(self.store.claim, tracking_id)
        try:
            raw = await asyncio.to_thread(self.store.raw, tracking_id)
            delivered, refused, answer = await self._deliver(envelope, raw)
        except BaseException:
            await asyncio.to_thread(self.store.unclaim, tracking_id)  # not sent: may try again
            raise
        try:
            done = await asyncio.to_thread(
                self.store.record_release, envelope, way, delivered, refused, answer
            )
        except OSError as exc:
            # Sent but not recorded: the claim stays, so nobody sends it a second time, and
            # says what went where for whoever asks next.
            log.error("%s: released to %s but not recorded: %s", tracking_id, delivered, exc)
            when = time.strftime("%Y-%m-%d %H:%M:%S %Z")
            note = f"{when} by {way} to {', '.join(delivered)}: {answer}; record failed: {exc}"
            await asyncio.to_thread(self.store.note_unrecorded, tracking_id, note)
            raise ReleaseFailed(
                f"{tracking_id} went to {', '.join(delivered)} but the record failed ({exc}); "
                "its claim file stays so it is not sent twice"
            ) from exc
        await asyncio.to_thread(self.store.unclaim, tracking_id)
        log.info(
            "%s: released by %s to %s%s",
            tracking_id,
            way,
            ", ".join(delivered),
            f" (refused for good: {', '.join(refused)})" if refused else "",
        )
        return done

    async def release_wanted(self, tracking_id: str, rerouted: bool = False) -> str | None:
        """The feedback intake's hook after a ham correction: release the held copy, if any.

        Returns one sentence for the correction's reply, or None when nothing is held under
        ``tracking_id`` and the verdict did not reroute it either.  A rerouted message whose
        copy is not here (held by another daemon sharing the model, expired, or deleted) gets
        a sentence saying so, so the user does not wait for it.  Never raises: the correction
        itself is already stored.
        """
        try:
            done = await self.release(tracking_id, "feedback")
        except NotHeld:
            if rerouted:
                return (
                    "held copy not on this filter (another filter's, expired or deleted); "
                    "ask the admin to release it"
                )
            return None
        except AlreadyReleased:
            return "held copy released before"
        except HeldMailError as exc:
            log.warning("%s: release after feedback failed: %s", tracking_id, exc)
            return "held copy not released (next hop); ask the admin to run mailweir release"
        except Exception:
            log.exception("%s: release after feedback failed", tracking_id)
            return "held copy not released (error); ask the admin to run mailweir release"
        return f"held copy released to {len(done.delivered_to)} recipient(s)"

    async def _deliver(
        self, envelope: HeldEnvelope, raw: bytes
    ) -> tuple[tuple[str, ...], tuple[str, ...], str]:
        """One next-hop transaction: (recipients taken, refused for good, final answer)."""
        relay = NextHopSession(self.settings.next_hop.address, self.helo_name(), self.timeouts())
        try:
            params = MailParameters(len(raw), envelope.eight_bit, envelope.smtputf8)
            await relay.start(envelope.sender, params)
            taken, refused, later = [], [], []
            for address in envelope.recipients:
                answer = await relay.add_recipient(address)
                bucket = taken if answer.is_positive else later if answer.is_temporary else refused
                bucket.append(f"{address}" if bucket is taken else f"{address} ({answer})")
            if later or not taken:
                # All or nothing for temporary refusals: the release stays open for a retry.
                await relay.reset()
                why = "; ".join(later or refused)
                raise ReleaseFailed(f"next hop did not take {envelope.tracking_id}: {why}")
            answer = await relay.send(raw)
        except RelayError as exc:
            raise ReleaseFailed(f"next hop failed releasing {envelope.tracking_id}: {exc}") from exc
        finally:
            await relay.close()
        return tuple(taken), tuple(refused), str(answer)

    def helo_name(self) -> str:
        s = self.settings
        return s.next_hop.helo_name or s.smtp.hostname or socket.getfqdn()

    def timeouts(self) -> RelayTimeouts:
        return RelayTimeouts.from_settings(self.settings.next_hop)


class QuarantineCollector(Collector):
    """The quarantine's figures, read from its folder at scrape time.

    The totals come from the folder's tally, so releases and expiries done by the commands
    (another process) are counted too.
    """

    def __init__(self, quarantine: Quarantine) -> None:
        self.quarantine = quarantine

    def collect(self) -> Iterator[Metric]:
        q = self.quarantine
        figures = q.store.figures(q.settings.quarantine.retention_days)
        tally = q.store.tally()
        yield GaugeMetricFamily(
            "mailweir_quarantine_held", "Held messages not yet released.", value=figures.held
        )
        yield GaugeMetricFamily(
            "mailweir_quarantine_oldest_age_seconds",
            "Age of the oldest held message not yet released (0: none).",
            value=figures.oldest_age,
        )
        yield GaugeMetricFamily(
            "mailweir_quarantine_past_retention",
            "Held messages older than quarantine.retention_days, waiting for an expiry.",
            value=figures.past_retention,
        )
        released = CounterMetricFamily(
            "mailweir_quarantine_released",
            "Held messages released, by way (command, http, feedback).",
            labels=["way"],
        )
        for way in RELEASE_WAYS:
            released.add_metric([way], tally.released.get(way, 0))
        yield released
        yield CounterMetricFamily(
            "mailweir_quarantine_expired",
            "Held messages deleted by an expiry command.",
            value=tally.expired,
        )
        yield CounterMetricFamily(
            "mailweir_quarantine_digests",
            "Digest mails of held messages sent.",
            value=tally.digests,
        )
        yield CounterMetricFamily(
            "mailweir_quarantine_hold_failures",
            "Rerouted messages answered 451 because the held copy could not be written.",
            value=q.hold_failures,
        )

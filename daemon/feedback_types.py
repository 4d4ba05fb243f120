"""What a correction asks for and what became of it: the contract between the feedback
channels (HTTP side, mail intake) and the code that retrains.

The retraining callable has the shape ``async def feedback(FeedbackRequest) -> FeedbackOutcome``.
It must not raise for an outcome a user can cause (an unknown tracking id, a rate limit): those
are statuses.  It raises only when the store failed, and then nothing may have changed.

Metrics: the callable counts what it decides (``Metrics.feedback(kind)`` for an accepted
correction, ``Metrics.feedback_refused(reason)`` for ``rate_limited`` / ``no_original`` /
``untrusted``); a channel counts only what it refuses before calling it (the HTTP side:
``unauthorized`` and ``invalid``), so nothing is counted twice.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import Literal

Correction = Literal["spam", "ham"]
"""What the message should have been: ``ham`` means "this was wanted mail"."""


@dataclass(frozen=True)
class FeedbackRequest:
    """One correction.  At least one of ``tracking_id`` and ``raw`` is set.

    With a tracking id the verdict record's stored token hashes are retrained, so the
    retraining is exact; ``raw`` (the message itself) is tokenized when there is no id or
    its hashes have expired.
    """

    correction: Correction
    channel: Literal["http", "mail"]
    tracking_id: str | None = None
    raw: bytes | None = None
    client: str = ""  # who sent it: a peer address, an authenticated name


class FeedbackStatus(enum.StrEnum):
    TRAINED = "trained"  # stored and the model retrained
    MOVED = "moved"  # it had been trained the other way; moved, not counted twice
    ALREADY_KNOWN = "already_known"  # the same correction was stored before; nothing changed
    NO_ORIGINAL = "no_original"  # the tracking id is unknown (or expired) and no message came
    RATE_LIMITED = "rate_limited"  # the sender has sent too many corrections lately
    REFUSED = "refused"  # not allowed to train (an untrusted sender, on the mail channel)


@dataclass(frozen=True)
class FeedbackOutcome:
    status: FeedbackStatus
    detail: str = ""  # one sentence for the user or the admin
    kind: str | None = None  # as logged: false_positive, false_negative or confirmation
    tracking_id: str | None = None
    rerouted: bool = False  # the verdict found rerouted the message to quarantine

    @property
    def accepted(self) -> bool:
        return self.status in (
            FeedbackStatus.TRAINED,
            FeedbackStatus.MOVED,
            FeedbackStatus.ALREADY_KNOWN,
        )

"""The daemon's one error tree, and the SMTP reply each error becomes at the edge.

::

    MailweirError
     +-- ConfigError(key, reason)          a configuration value is unusable
     +-- RelayError                        anything about the next hop
     |    +-- NextHopUnavailable(reply)    down, refused, timed out, reset, or a 4xx
     |    +-- NextHopRejected(code, enhanced, text)
     |                                     a permanent (5xx) answer, passed back as is
     +-- ScoringFailed                     judging the message failed

Library errors (aiosmtplib, OSError) are mapped into this tree where they happen
(``relay.relay_errors``) and re-raised ``from`` the original, so nothing is lost; the SMTP
handler turns a tree error into its reply with :func:`reply_for`.
"""

from __future__ import annotations

from mailweir.daemon import replies
from mailweir.daemon.replies import Reply


class MailweirError(Exception):
    """Base of every error mailweir raises on purpose."""


class ConfigError(MailweirError):
    """A configuration key holds a value the daemon cannot use.

    ``key`` is the dotted key as the admin writes it (``"smtp.listen"``); ``reason`` says what
    was wrong and what was expected.
    """

    def __init__(self, key: str, reason: str) -> None:
        super().__init__(f"{key}: {reason}")
        self.key = key
        self.reason = reason


class ScoringFailed(MailweirError):
    """Judging a message failed (a bug, a locked database, an unforeseen parse)."""


class RelayError(MailweirError):
    """Something went wrong between mailweir and the next hop."""

    reply: Reply = replies.NEXT_HOP_DOWN


class NextHopUnavailable(RelayError):
    """The next hop cannot take the message now; the upstream should keep it and retry.

    ``reply`` is the temporary reply mailweir gives upstream (451 4.4.1 for a refused
    connection, 451 4.4.2 for a dropped one, 451 4.4.7 for a timeout, or the next hop's own
    4xx).
    """

    def __init__(self, message: str, reply: Reply = replies.NEXT_HOP_DOWN) -> None:
        super().__init__(message)
        self.reply = reply


class NextHopRejected(RelayError):
    """The next hop refused permanently (5xx); its code, enhanced code and text go upstream."""

    def __init__(self, code: int, enhanced: str, text: str) -> None:
        super().__init__(f"next hop answered {code} {enhanced} {text}".rstrip())
        self.code = code
        self.enhanced = enhanced
        self.text = text
        self.reply = Reply(code, enhanced or replies.default_enhanced(code), text)


def reply_for(error: BaseException) -> Reply:
    """The SMTP reply the upstream gets for ``error`` (the one table from errors to replies)."""
    if isinstance(error, RelayError):
        return error.reply
    for kind, reply in _TABLE:
        if isinstance(error, kind):
            return reply
    return replies.LOCAL_ERROR


_TABLE: tuple[tuple[type[BaseException], Reply], ...] = (
    (ScoringFailed, replies.SCORING_FAILED),
    (ConfigError, replies.LOCAL_ERROR),
    (MailweirError, replies.LOCAL_ERROR),
)

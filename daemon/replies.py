"""Every SMTP reply mailweir composes itself, as named values.

Each value cites the RFC 5321 section for its basic code and the RFC 3463 section for its
enhanced status code (class.subject.detail).  Replies the next hop gives are carried through as
:class:`Reply` values built from its answer (see :func:`from_next_hop`).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

_ENHANCED = re.compile(r"^([245])\.(\d{1,3})\.(\d{1,3})(?:\s+|$)")
_UNSAFE = re.compile(r"[\x00-\x1f\x7f]")


@dataclass(frozen=True)
class Reply:
    """One SMTP reply: basic code (RFC 5321 section 4.2), enhanced code (RFC 3463), text."""

    code: int
    enhanced: str
    text: str

    @property
    def is_positive(self) -> bool:
        return 200 <= self.code < 400

    @property
    def is_temporary(self) -> bool:
        return 400 <= self.code < 500

    def __str__(self) -> str:
        """The reply as aiosmtpd pushes it; multi-line text becomes "code-" continuation lines
        (RFC 5321 section 4.2.1), each repeating the enhanced code (RFC 2034 section 4)."""
        # The next hop's text may hold control characters or undecodable bytes (surrogates).
        text = self.text.encode("utf-8", "replace").decode("utf-8")
        lines = [_UNSAFE.sub(" ", line).strip() for line in text.splitlines()] or [""]
        prefix = f"{self.enhanced} " if self.enhanced else ""
        head = [f"{self.code}-{prefix}{line}".rstrip() for line in lines[:-1]]
        return "\r\n".join([*head, f"{self.code} {prefix}{lines[-1]}".rstrip()])


def default_enhanced(code: int) -> str:
    """X.0.0, "other undefined status" of the code's class (RFC 3463 section 3.1)."""
    return f"{code // 100}.0.0" if code // 100 in (2, 4, 5) else ""


def from_next_hop(code: int, message: str) -> Reply:
    """The next hop's answer as a Reply, splitting off its enhanced code when it gave one.

    An enhanced code whose class disagrees with the basic code is left in the text and the
    class default used instead (RFC 3463 section 2: the classes must agree).
    """
    match = _ENHANCED.match(message)
    if match and int(match.group(1)) == code // 100:
        return Reply(code, ".".join(match.groups()), message[match.end() :])
    return Reply(code, default_enhanced(code), message)


# -- accepted --------------------------------------------------------------------------------
# RFC 5321 section 4.2.2 (250 "Requested mail action okay, completed");
# RFC 3463 section 3.2 (X.1.5 "Destination address valid") and 3.1 (X.0.0).
RECIPIENT_OK = Reply(250, "2.1.5", "Recipient ok")
MESSAGE_ACCEPTED = Reply(250, "2.0.0", "Message accepted")
RESET_OK = Reply(250, "2.0.0", "Reset")
CLOSING = Reply(221, "2.0.0", "Closing connection")  # RFC 5321 section 4.2.2, 221

# -- temporary: the upstream keeps the message and retries -------------------------------------
# RFC 3463 section 3.5, X.4.1 "No answer from host": the connection attempt was not answered
# (refused, timed out while connecting, or the greeting refused us).
NEXT_HOP_DOWN = Reply(451, "4.4.1", "Next hop unavailable, try again later")
# RFC 3463 section 3.5, X.4.2 "Bad connection": established, but the transaction could not be
# completed "either because of time-out, or inadequate connection quality".
NEXT_HOP_LOST = Reply(451, "4.4.2", "Connection to next hop lost, try again later")
NEXT_HOP_TIMEOUT = Reply(451, "4.4.2", "Next hop did not answer in time, try again later")
# X.6.7, the enhanced code RFC 6531 adds to RFC 3463 (section number from memory): the next hop
# cannot take a message that needs SMTPUTF8.  Temporary: fixing the next hop must not lose mail.
NEXT_HOP_NO_SMTPUTF8 = Reply(451, "4.6.7", "Next hop does not support SMTPUTF8")
# RFC 5321 section 4.2.3 (451 "local error in processing"); RFC 3463 section 3.4,
# X.3.0 "Other or undefined mail system status".
SCORING_FAILED = Reply(451, "4.3.0", "Message could not be checked, try again later")
LOCAL_ERROR = Reply(451, "4.3.0", "Local error in processing, try again later")
# RFC 3463 section 3.4, X.3.5 "System incorrectly configured": the quarantine mailbox is
# refused by the next hop.
QUARANTINE_REFUSED = Reply(451, "4.3.5", "Quarantine mailbox refused by next hop")
# RFC 5321 section 4.5.3.1.10 (452 for too many recipients); RFC 3463 section 3.6,
# X.5.3 "Too many recipients".
TOO_MANY_RECIPIENTS = Reply(452, "4.5.3", "Too many recipients")
# RFC 5321 section 3.8 and 4.2.3 (421 closes the channel); RFC 3463 section 3.4,
# X.3.2 "System not accepting network messages".
TOO_MANY_CONNECTIONS = Reply(421, "4.3.2", "Too many connections, try again later")
# RFC 5321 section 3.8 (a server that must shut down may answer 421 to anything and close);
# RFC 3463 section 3.4, X.3.2 names "an imminent shutdown" among its examples.
SHUTTING_DOWN = Reply(421, "4.3.2", "Service shutting down, try again later")
# RFC 5321 section 3.8 (421 closes the channel); RFC 3463 section 3.8, X.7.0 "Other or
# undefined security status": a policy refusal, as for a client over its connection share.
TOO_MANY_FROM_CLIENT = Reply(421, "4.7.0", "Too many connections from your address, try later")
# RFC 5321 sections 3.8 and 4.5.3.2 (a server may close on timeout, with 421); RFC 3463
# section 3.5, X.4.2 "Bad connection" names the time-out case.
NO_FIRST_COMMAND = Reply(421, "4.4.2", "No command received in time, closing connection")
# 451 "local error in processing" (RFC 5321 section 4.2.3), X.3.0 "Other or undefined mail
# system status" (RFC 3463 section 3.4): the held copy could not be written, so the message
# is not rerouted; the upstream retries later.
HOLD_FAILED = Reply(451, "4.3.0", "Quarantine copy not stored, try again later")

# -- permanent --------------------------------------------------------------------------------
# RFC 5321 section 4.2.3 (552 "exceeded storage allocation"); RFC 3463 section 3.4,
# X.3.4 "Message too big for system".
MESSAGE_TOO_BIG = Reply(552, "5.3.4", "Message too big")
# RFC 5321 section 4.2.3 (553 "mailbox name not allowed"); RFC 3463 section 3.2,
# X.1.3 "Bad destination mailbox address syntax" (X.1.7 for the sender): an address holding
# control characters, which no SMTP command line may carry (RFC 5321 section 4.1.2).
BAD_RECIPIENT_SYNTAX = Reply(553, "5.1.3", "Address contains control characters")
BAD_SENDER_SYNTAX = Reply(553, "5.1.7", "Sender address contains control characters")
# RFC 5321 section 4.2.3 (550 "mailbox unavailable ... or rejected for policy reasons");
# RFC 3463 section 3.8, X.7.1 "Delivery not authorized, message refused".
REJECTED_AS_SPAM = Reply(550, "5.7.1", "Message refused as spam")
# RFC 5321 section 4.2.3 (550 "rejected for policy reasons"); RFC 3463 section 3.8, X.7.1
# "Delivery not authorized, message refused": the site's block list, not the content.
SENDER_REFUSED = Reply(550, "5.7.1", "Message refused by site policy for this sender")

# -- XFORWARD (daemon/xforward.py) ------------------------------------------------------------
# RFC 5321 section 4.2.2 (250); RFC 3463 section 3.1, X.0.0.
XFORWARD_OK = Reply(250, "2.0.0", "Ok")
# RFC 5321 section 4.2.3 (550 "rejected for policy reasons"); RFC 3463 section 3.8, X.7.0
# "Other or undefined security status": a client outside smtp.xforward_networks.
XFORWARD_NOT_PERMITTED = Reply(550, "5.7.0", "XFORWARD not permitted from this client")
# RFC 5321 section 4.2.3 (503 "Bad sequence of commands"); RFC 3463 section 3.6, X.5.1
# "Invalid command" (out of sequence).
XFORWARD_NEEDS_EHLO = Reply(503, "5.5.1", "Send EHLO first")
XFORWARD_IN_TRANSACTION = Reply(503, "5.5.1", "XFORWARD not allowed within a mail transaction")

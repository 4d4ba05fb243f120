"""A quick reading of the common MAIL FROM / RCPT TO path, ``<local@domain.example>``.

aiosmtpd reads every path with the email package's RFC 5322 header parser (and defines a
class on each call); on a busy relay that was about a tenth of the daemon's CPU.  Nearly every
path a mail server sends is a plain dot-atom in angle brackets, which one regular expression
reads to the same result; anything else (quoted local parts, address literals, comments,
encoded words, non-ASCII) returns None and goes to aiosmtpd's own reading.
"""

from __future__ import annotations

import re

# RFC 5322 section 3.2.3: atext, and dot-atom-text as one or more atoms joined by dots.
_ATEXT = r"[A-Za-z0-9!#$%&'*+\-/=?^_`{|}~]+"
_DOT_ATOM = rf"{_ATEXT}(?:\.{_ATEXT})*"
_PLAIN = re.compile(rf"<({_DOT_ATOM}@{_DOT_ATOM})>(?:[ \t]+)?")


def plain_path(arg: str) -> tuple[str, str] | None:
    """(address, the rest of the line) for ``<dot-atom@dot-atom>``, as aiosmtpd's
    ``SMTP._getaddr`` gives them; None for any other form."""
    match = _PLAIN.match(arg)
    if match is None:
        return None
    address = match.group(1)
    rest = arg[match.end() :]
    # "=?" may start an RFC 2047 encoded word, which the header parser decodes; "(" starts
    # a comment it skips.
    if "=?" in address or rest.startswith("("):
        return None
    return address, rest

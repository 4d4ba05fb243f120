"""XFORWARD: the upstream mail server tells us who its client was.

Behind Postfix (before the queue through ``smtpd_proxy_filter``, or after it through a
``content_filter`` with ``smtp_send_xforward_command = yes``) every connection comes from the
mail server itself.  Postfix's XFORWARD extension (documented in its XFORWARD_README) sends
the original client's address and names before each transaction, so the site policy's
network lists and the feedback address's trusted networks can see the real client.

Syntax: ``XFORWARD 1*(SP name "=" xtext)`` with names NAME, ADDR, PROTO, HELO, SOURCE (case
insensitive); values are xtext (RFC 3461 section 4); ``[UNAVAILABLE]`` and ``[TEMPUNAVAIL]``
mean "not known".  Only clients in ``smtp.xforward_networks`` may send it: anyone else could
claim a trusted address.  The attributes hold for one transaction (the aiosmtpd envelope),
as in Postfix, and the upstream sends them again before the next MAIL.

Passing it on: when the next hop offers XFORWARD (Postfix's reinjection listener with
``smtpd_authorized_xforward_hosts``), mailweir tells it the same before each MAIL
(:func:`passed_on`, :func:`command_lines`), so the next hop's log names the real client
beside mailweir (Postfix: ``orig_client=``): what the upstream's XFORWARD said, or else the
connection's own address and HELO.  Only the attributes the next hop lists are sent.
"""

from __future__ import annotations

import ipaddress
import re
from dataclasses import dataclass, replace
from typing import Any

from mailweir.daemon.replies import Reply

ATTRIBUTES = ("NAME", "ADDR", "PROTO", "HELO", "SOURCE")
EHLO_LINE = "250-XFORWARD " + " ".join(ATTRIBUTES)
_NOT_KNOWN = {"[UNAVAILABLE]", "[TEMPUNAVAIL]"}
_MAX_VALUE = 255  # a host name's limit (RFC 1035), ample for an address or a protocol name
_XTEXT_HEX = re.compile(r"\+([0-9A-Fa-f]{2})")
_XTEXT_PLAIN = frozenset(range(0x21, 0x7F)) - {ord("+"), ord("=")}  # RFC 3461 section 4
_LINE_LIMIT = 512  # bytes of one command line, CRLF included (RFC 5321 section 4.5.3.1.4)
NOT_KNOWN = "[UNAVAILABLE]"


@dataclass(frozen=True)
class Forwarded:
    """What the upstream said about its client; None where it said nothing or "not known"."""

    addr: str | None = None
    name: str | None = None
    helo: str | None = None
    proto: str | None = None
    source: str | None = None

    @property
    def peer(self) -> tuple[str, int] | None:
        """``addr`` in the form of aiosmtpd's ``session.peer``, for the address checks."""
        return (self.addr, 0) if self.addr is not None else None


def upstream_client(session: Any, envelope: Any) -> object:
    """The client that address checks look at: the one XFORWARD named, else aiosmtpd's
    ``session.peer`` (the connection's own)."""
    forwarded = getattr(envelope, "forwarded", None)
    peer = forwarded.peer if isinstance(forwarded, Forwarded) else None
    return peer if peer is not None else session.peer


def passed_on(session: Any, envelope: Any) -> Forwarded:
    """What the next hop hears of this transaction's client: the upstream's own XFORWARD if
    it sent one, else the connection itself (address, HELO name, SMTP or ESMTP)."""
    forwarded = getattr(envelope, "forwarded", None)
    if isinstance(forwarded, Forwarded):
        return forwarded
    peer = session.peer
    addr = peer[0] if isinstance(peer, tuple) and peer else None
    try:
        addr = None if addr is None else str(ipaddress.ip_address(str(addr).split("%", 1)[0]))
    except ValueError:
        addr = None  # a Unix socket or a test double: nothing worth telling
    proto = "ESMTP" if getattr(session, "extended_smtp", False) else "SMTP"
    return Forwarded(addr=addr, helo=session.host_name or None, proto=proto)


def command_lines(client: Forwarded, offered: str) -> list[bytes]:
    """The arguments of the XFORWARD commands that tell ``client`` to a next hop whose EHLO
    listed ``offered`` ("NAME ADDR PROTO HELO SOURCE"); each line fits the command-line limit.
    Attributes the next hop did not list are left out; unknown values are "[UNAVAILABLE]"."""
    wanted = {name.upper() for name in offered.split()}
    pairs = []
    for name in ATTRIBUTES:
        if name not in wanted:
            continue
        value = getattr(client, name.lower())
        if value is not None and name == "ADDR" and ":" in value:
            value = "IPV6:" + value  # as Postfix writes an IPv6 client (and parse reads it)
        if name == "SOURCE" and value is None:
            continue  # no "not known" form: the next hop keeps its own default
        text = NOT_KNOWN if value is None else _xtext_encode(value[:_MAX_VALUE])
        pairs.append(f"{name}={text}".encode("ascii"))
    lines: list[bytes] = []
    room = _LINE_LIMIT - len(b"XFORWARD \r\n")
    for pair in pairs:
        if lines and len(lines[-1]) + 1 + len(pair) <= room:
            lines[-1] += b" " + pair
        else:
            lines.append(pair)
    return lines


def _xtext_encode(value: str) -> str:
    raw = value.encode("utf-8", "surrogateescape")
    return "".join(chr(b) if b in _XTEXT_PLAIN else f"+{b:02X}" for b in raw)


class XforwardError(ValueError):
    """A malformed XFORWARD argument; ``reply`` is the 501 to answer."""

    def __init__(self, text: str) -> None:
        super().__init__(text)
        self.reply = Reply(501, "5.5.4", text)


def parse(arg: str | None, known: Forwarded | None = None) -> Forwarded:
    """Add one XFORWARD command's attributes to ``known`` (they arrive incrementally)."""
    pairs = (arg or "").split()
    if not pairs:
        raise XforwardError("XFORWARD needs at least one attribute=value")
    found = known or Forwarded()
    for pair in pairs:
        name, sep, raw = pair.partition("=")
        name = name.upper()
        if not sep or name not in ATTRIBUTES:
            raise XforwardError(f"bad XFORWARD attribute {pair[:40]!r}")
        value = _xtext_decode(raw)
        if len(value) > _MAX_VALUE:
            raise XforwardError(f"XFORWARD {name} longer than {_MAX_VALUE} characters")
        if value in _NOT_KNOWN or not value:
            found = replace(found, **{name.lower(): None})
            continue
        if name == "ADDR":
            value = _address(value)
        found = replace(found, **{name.lower(): value})
    return found


def _xtext_decode(raw: str) -> str:
    return _XTEXT_HEX.sub(lambda m: chr(int(m.group(1), 16)), raw)


def _address(value: str) -> str:
    # Postfix writes IPv6 client addresses with an "IPV6:" prefix (as in RFC 5321 literals).
    text = value[5:] if value.upper().startswith("IPV6:") else value
    try:
        return str(ipaddress.ip_address(text.split("%", 1)[0]))
    except ValueError:
        raise XforwardError(f"XFORWARD ADDR {value[:60]!r} is not an IP address") from None

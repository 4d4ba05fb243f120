"""Tokens from the top-level header fields: subject, sender, reply-to, mailer, field names,
the relays the message came through, its authentication results and its Message-ID.

Prefixes: "subj:" subject words and shape, "from:" sender, "rt:" reply-to, "rcvd:" relays,
"auth:" authentication results, "mid:" Message-ID, "list:" mailing list, "hdr:" the rest.
"""

from __future__ import annotations

import functools
import re
from typing import Final

from .charsets import decode_header_value
from .domains import MEMO_ENTRIES, address_domain, clean_host, is_ip, registrable
from .mime import MAX_FIELD_BYTES, Part
from .normalize import clean_text
from .words import split_words

MAX_NAME: Final = 40
_MAILER_FAMILY: Final = re.compile(r"[a-z][a-z\-]{1,19}")
_REPLY: Final = re.compile(r"(?i)^\s*(re|aw|sv|antw)\s*(\[\d+\])?\s*:")
_ANGLE_ADDRESS: Final = re.compile(r"<([^<>]{0,300})>")
_BARE_ADDRESS: Final = re.compile(r"[^\s<>\"(),;:]{1,200}@[^\s<>\"(),;:]{1,255}")
_FORWARD: Final = re.compile(r"(?i)^\s*(fwd?|wg|tr|vs)\s*:")
# Received: "from <helo> (<reverse name> [<address>]) by ..." (RFC 5321 section 4.4; the
# parenthesised TCP-info is how the common servers write it, reverse name "unknown" when the
# address has none).
_RECEIVED_FROM: Final = re.compile(r"(?i)^\s*from\s+(\S{1,255})(?:\s+\(([^()]{0,600})\))?")
_TCP_INFO: Final = re.compile(
    r"^\s*([^\s\[\]]{1,255})?\s*\[([0-9a-fA-F.:]{1,60}|(?i:ipv6):[0-9a-fA-F.:]{1,60})\]"
)
RELAY_HOPS: Final = 2  # the newest Received fields read: the hops nearest our own server
# Authentication-Results (RFC 8601 section 2.2): "authserv-id; method=result ptype.prop=value".
_COMMENT: Final = re.compile(r"\([^()]*\)")
_RESULT: Final = re.compile(r"(?i)^([a-z][a-z0-9-]{0,15})(?:/[0-9]+)?\s*=\s*([a-z]{1,16})\b")
_DKIM_DOMAIN: Final = re.compile(r"(?i)\bheader\.d\s*=\s*([^\s;]{1,255})")
MAX_RESULTS: Final = 8
MAX_RESULTS_TEXT: Final = 4096  # characters of the field read; results come first
MAX_COMMENT_DEPTH: Final = 8  # nesting undone; deeper is junk, and each level is one pass
_ID_DOMAIN: Final = re.compile(r"@([^\s<>@\[\]]{1,255})")  # msg-id, RFC 5322 section 3.6.4
_LIST_ID: Final = re.compile(r"<([^<>\s]{1,255})>")  # RFC 2919: "phrase <label.namespace>"
_PRECEDENCE: Final = frozenset({"bulk", "list", "junk"})  # common practice, no source


def bucket(count: int) -> str:
    """Small-count bucket: "0", "1", "2", "3-4", "5-8", "9-16", "17+"."""
    if count <= 2:
        return str(count)
    for high in (4, 8, 16):
        if count <= high:
            return f"{high // 2 + 1}-{high}"
    return "17+"


def split_address(value: str) -> tuple[str, str]:
    """(display name, address) of the first mailbox in an address field (RFC 5322 3.4).

    Lenient on purpose: forged and broken sender fields are common in spam, and a regular
    expression is both faster and harder to confuse than a full grammar.
    """
    angle = _ANGLE_ADDRESS.search(value)
    if angle:
        name = value[: angle.start()].strip().strip('"').strip()
        return name, angle.group(1).strip()
    bare = _BARE_ADDRESS.search(value)
    return ("", bare.group(0)) if bare else (value.strip().strip('"'), "")


def subject_tokens(top: Part) -> list[str]:
    """Subject words prefixed "subj:", plus markers for its shape and encoding."""
    raw = top.field("subject")
    if raw is None or not raw.strip():
        return ["subj:none"]
    text, encoded = decode_header_value(raw[:MAX_FIELD_BYTES])
    found = ["subj:encoded"] if encoded else []
    letters = [ch for ch in text[:200] if ch.isalpha()]
    if len(letters) >= 4 and all(ch.isupper() for ch in letters):
        found.append("subj:all-caps")
    if _REPLY.match(text):
        found.append("subj:reply")
    elif _FORWARD.match(text):
        found.append("subj:forward")
    cleaned, invisible = clean_text(text)
    if invisible:
        found.append("subj:obf:invisible")
    found.extend(split_words(cleaned, "subj:").tokens)
    return found


def sender_tokens(top: Part) -> list[str]:
    """Display-name words ("from:name:"), the From and Reply-To domains and how they relate,
    and where the Message-ID was made ("mid:")."""
    domain, first, rest = _from_and_reply(
        top.field_text("from")[:1024], top.field_text("reply-to")[:1024]
    )
    return [first, _message_id_token(top, domain), *rest]


# Senders repeat from message to message (a site's correspondents, its lists), and these
# tokens depend on the two fields alone: a bounded memo answers those from a dict
# (``sender_tokens`` 4.1 against 11.3 µs a message for the relay bench's mail, 15 senders).
@functools.lru_cache(maxsize=MEMO_ENTRIES)
def _from_and_reply(from_text: str, reply_text: str) -> tuple[str, str, tuple[str, ...]]:
    """The From domain, its token, and the tokens of the display name and of Reply-To."""
    name, address = split_address(from_text)
    domain = address_domain(address)
    first = f"from:dom:{registrable(domain)}" if domain else "from:dom:none"
    found: list[str] = []
    if not name.strip():
        found.append("from:noname")
    else:
        if "@" in name:
            found.append("from:name-has-address")
        found.extend(split_words(clean_text(name)[0], "from:name:").tokens)
    if reply_text:
        reply_domain = address_domain(split_address(reply_text)[1])
        if reply_domain:
            found.append(f"rt:dom:{registrable(reply_domain)}")
            same = domain and registrable(reply_domain) == registrable(domain)
            found.append("rt:same" if same else "rt:differs")
    return domain, first, tuple(found)


def structure_tokens(top: Part) -> list[str]:
    """Mailer family, the names of the fields present, the number of relay hops, and for list
    mail the list's domain ("list:dom:", from List-Id, RFC 2919) and a Precedence value."""
    mailer = (top.field_text("x-mailer") or top.field_text("user-agent"))[:200].lower()
    family = _MAILER_FAMILY.search(mailer)
    found = [f"hdr:mailer:{family.group(0)}" if family else "hdr:mailer:none"]
    names = dict.fromkeys(name for name, _ in top.fields if len(name) <= MAX_NAME)
    found.extend(f"hdr:field:{name}" for name in names)
    hops = sum(1 for name, _ in top.fields if name == "received")
    found.append(f"hdr:hops:{bucket(hops)}")
    if "list-id" in names:
        listed = _LIST_ID.search((top.field("list-id") or b"")[:1024].decode("latin-1"))
        host = clean_host(listed.group(1)) if listed else ""
        if host and "." in host:
            found.append(f"list:dom:{registrable(host)}")
    if "precedence" in names:
        value = (top.field("precedence") or b"")[:40].decode("latin-1").strip().lower()
        if value in _PRECEDENCE:
            found.append(f"hdr:precedence:{value}")
    return found


def relay_tokens(top: Part) -> list[str]:
    """The newest ``RELAY_HOPS`` relays: "rcvd:dom:<domain>" of each one's reverse name,
    "rcvd:no-rdns" for an address without one, and for the newest hop (the client our own
    server talked to) whether its HELO name is an address or another domain than its
    reverse name ("rcvd:helo-ip", "rcvd:helo-differs", "rcvd:helo-matches")."""
    hops = [value for name, value in top.fields if name == "received"][:RELAY_HOPS]
    found: list[str] = []
    for number, raw in enumerate(hops):
        text = raw[:MAX_FIELD_BYTES].decode("latin-1")
        clause = _RECEIVED_FROM.match(text)
        if clause is None:
            continue  # "by ..." only, or a local delivery: no relay named
        info = _TCP_INFO.match(clause.group(2) or "")
        reverse = info.group(1) if info and info.group(1) else ""
        if not info or reverse.lower() == "unknown":
            found.append("rcvd:no-rdns")
            reverse = ""
        host = clean_host(reverse)
        if host and not is_ip(host):
            found.append(f"rcvd:dom:{registrable(host)}")
        if number == 0:
            found.extend(_helo_tokens(clause.group(1), host))
    return found


def _helo_tokens(helo: str, reverse: str) -> list[str]:
    name = clean_host(helo.strip("[]"))
    if not name or is_ip(name) or helo.startswith("["):
        return ["rcvd:helo-ip"]
    if not reverse or is_ip(reverse):
        return []
    return [
        "rcvd:helo-matches" if registrable(name) == registrable(reverse) else "rcvd:helo-differs"
    ]


def auth_tokens(top: Part) -> list[str]:
    """ "auth:<method>:<result>" (spf, dkim, dmarc, ...) and "auth:dkim-pass:<domain>" from
    the newest Authentication-Results field only: the one the server in front of us added,
    which RFC 8601 section 5 asks to remove forged ones carrying its name; "auth:none" when
    there is none."""
    raw = top.field("authentication-results")
    if raw is None:
        return ["auth:none"]
    text = raw[:MAX_RESULTS_TEXT].decode("latin-1")
    for _ in range(MAX_COMMENT_DEPTH):  # comments nest (RFC 5322 section 3.2.2): innermost first
        text, removed = _COMMENT.subn(" ", text)
        if not removed:
            break
    found: list[str] = []
    for clause in text.split(";")[1 : MAX_RESULTS + 1]:  # the first is the authserv-id
        result = _RESULT.match(clause.strip())
        if result is None:
            continue
        method, outcome = result.group(1).lower(), result.group(2).lower()
        found.append(f"auth:{method}:{outcome}")
        if method == "dkim" and outcome == "pass":
            signer = _DKIM_DOMAIN.search(clause)
            host = clean_host(signer.group(1)) if signer else ""
            if host:
                found.append(f"auth:dkim-pass:{registrable(host)}")
    return found or ["auth:no-results"]


def _message_id_token(top: Part, sender: str) -> str:
    """ "mid:from-domain" when the Message-ID's domain is the From domain's, else
    "mid:dom:<domain>"; "mid:none" when it is missing or has no domain."""
    raw = top.field("message-id")
    found = _ID_DOMAIN.search(raw[:1024].decode("latin-1")) if raw else None
    host = clean_host(found.group(1)) if found else ""
    if not host:
        return "mid:none"
    mine = registrable(host)
    return "mid:from-domain" if sender and mine == registrable(sender) else f"mid:dom:{mine}"

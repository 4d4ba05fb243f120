"""Tokens from the top-level header fields: subject, sender, reply-to, mailer, field names.

Prefixes: "subj:" subject words and shape, "from:" sender, "rt:" reply-to, "hdr:" the rest.
"""

from __future__ import annotations

import re
from typing import Final

from .charsets import decode_header_value
from .domains import address_domain, registrable
from .mime import MAX_FIELD_BYTES, Part
from .normalize import clean_text
from .words import split_words

MAX_NAME: Final = 40
_MAILER_FAMILY: Final = re.compile(r"[a-z][a-z\-]{1,19}")
_REPLY: Final = re.compile(r"(?i)^\s*(re|aw|sv|antw)\s*(\[\d+\])?\s*:")
_ANGLE_ADDRESS: Final = re.compile(r"<([^<>]{0,300})>")
_BARE_ADDRESS: Final = re.compile(r"[^\s<>\"(),;:]{1,200}@[^\s<>\"(),;:]{1,255}")
_FORWARD: Final = re.compile(r"(?i)^\s*(fwd?|wg|tr|vs)\s*:")


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
    """Display-name words ("from:name:"), the From and Reply-To domains and how they relate."""
    name, address = split_address(top.field_text("from")[:1024])
    domain = address_domain(address)
    found = [f"from:dom:{registrable(domain)}" if domain else "from:dom:none"]
    if not name.strip():
        found.append("from:noname")
    else:
        if "@" in name:
            found.append("from:name-has-address")
        found.extend(split_words(clean_text(name)[0], "from:name:").tokens)
    reply_raw = top.field_text("reply-to")
    if reply_raw:
        reply_domain = address_domain(split_address(reply_raw[:1024])[1])
        if reply_domain:
            found.append(f"rt:dom:{registrable(reply_domain)}")
            same = domain and registrable(reply_domain) == registrable(domain)
            found.append("rt:same" if same else "rt:differs")
    return found


def structure_tokens(top: Part) -> list[str]:
    """Mailer family, the names of the fields present, and the number of relay hops."""
    mailer = (top.field_text("x-mailer") or top.field_text("user-agent"))[:200].lower()
    family = _MAILER_FAMILY.search(mailer)
    found = [f"hdr:mailer:{family.group(0)}" if family else "hdr:mailer:none"]
    names = dict.fromkeys(name for name, _ in top.fields if len(name) <= MAX_NAME)
    found.extend(f"hdr:field:{name}" for name in names)
    hops = sum(1 for name, _ in top.fields if name == "received")
    found.append(f"hdr:hops:{bucket(hops)}")
    return found

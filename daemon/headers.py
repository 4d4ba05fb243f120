"""Byte-exact header surgery on a raw message (RFC 5322 section 2.2).

Three operations, each leaving every other byte of the message as it was:

- :func:`remove_own_fields` drops incoming fields whose name starts with ``mailweir-`` (any
  case), continuation lines included, so a sender cannot forge a verdict;
- :func:`prepend_fields` puts our fields on top of the header;
- :func:`prefix_subject` puts a marker in front of the first Subject field's text.

The header ends at the first empty line; a line starting with space or tab continues the field
above it (RFC 5322 section 2.2.3).  Our own fields are 7-bit, folded at 78 characters.
"""

from __future__ import annotations

import base64
import re
from collections.abc import Iterable, Sequence

from mailweir.model.types import OWN_HEADER_PREFIX

FOLD_WIDTH = 78  # RFC 5322 section 2.1.1: lines SHOULD be no more than 78 characters
EVIDENCE_EACH_WAY = 3
_TOKEN_TEXT_MAX = 30  # characters of one evidence token shown; its encoded word stays < 75
_PREFIX = OWN_HEADER_PREFIX.encode("ascii")
_PLAIN_TOKEN = re.compile(r"[!-~]+")  # printable ASCII, no space (RFC 5322 section 3.2.3 text)


def _line_ending(raw: bytes) -> bytes:
    first = raw.find(b"\n")
    return b"\n" if first > 0 and raw[first - 1 : first] != b"\r" else b"\r\n"


def _split_header(raw: bytes) -> tuple[list[bytes], int]:
    """Header lines (each with its line ending) and the offset where the rest (the empty
    line and the body) starts; the body is not copied until a change needs it."""
    lines: list[bytes] = []
    position = 0
    while position < len(raw):
        end = raw.find(b"\n", position)
        end = len(raw) if end < 0 else end + 1
        line = raw[position:end]
        if line in (b"\r\n", b"\n"):
            break
        lines.append(line)
        position = end
    return lines, position


def _header_length(raw: bytes) -> int:
    """Where the first empty line starts (as in :func:`_split_header`), else ``len(raw)``."""
    if raw[:1] == b"\n" or raw[:2] == b"\r\n":
        return 0
    crlf = raw.find(b"\n\r\n")
    limit = len(raw) if crlf < 0 else crlf + 2  # a bare-LF empty line can only come before
    lf = raw.find(b"\n\n", 0, limit)
    ends = [at + 1 for at in (crlf, lf) if at >= 0]
    return min(ends, default=len(raw))


def _field_name(line: bytes) -> bytes | None:
    """The field name of a line that starts a field, else None (continuations, junk)."""
    if line[:1] in (b" ", b"\t"):
        return None
    name, colon, _ = line.partition(b":")
    return name.rstrip(b" \t").lower() if colon else None


def remove_own_fields(raw: bytes) -> bytes:
    """``raw`` without any header field named ``mailweir-*`` (case-insensitive)."""
    if _PREFIX not in raw[: _header_length(raw)].lower():
        return raw  # the common case, in C: no line of the header can start a field of ours
    lines, body_at = _split_header(raw)
    kept: list[bytes] = []
    dropping = False
    for line in lines:
        name = _field_name(line)
        if line[:1] not in (b" ", b"\t"):
            dropping = name is not None and name.startswith(_PREFIX)
        if not dropping:
            kept.append(line)
    if len(kept) == len(lines):
        return raw
    return b"".join(kept) + raw[body_at:]


def prepend_fields(raw: bytes, fields: Iterable[tuple[str, str]]) -> bytes:
    """``raw`` with ``fields`` (name, value) on top, folded, in the message's line ending."""
    eol = _line_ending(raw).decode("ascii")
    block = "".join(fold(name, value, eol) + eol for name, value in fields)
    # surrogateescape: envelope addresses carry the upstream's bytes, valid UTF-8 or not.
    return block.encode("utf-8", "surrogateescape") + raw


def prefix_subject(raw: bytes, prefix: str) -> bytes:
    """Put ``prefix`` before the first Subject field's text, unless it is already there.

    A non-ASCII prefix goes in as an RFC 2047 encoded word.  A message without a Subject field
    is returned unchanged.
    """
    if not prefix:
        return raw
    marker = (prefix if prefix.isascii() else encoded_word(prefix)).encode("ascii")
    lines, body_at = _split_header(raw)
    for index, line in enumerate(lines):
        if _field_name(line) == b"subject":
            colon = line.index(b":") + 1
            text_start = colon + len(line[colon:]) - len(line[colon:].lstrip(b" \t"))
            if line[text_start:].startswith(marker):
                return raw
            lines[index] = line[:colon] + b" " + marker + b" " + line[text_start:]
            return b"".join(lines) + raw[body_at:]
    return raw


def encoded_word(text: str) -> str:
    """RFC 2047 section 4.1 "B" encoded word in UTF-8."""
    data = text.encode("utf-8", "replace")  # a lone surrogate becomes "?", never an error
    return "=?utf-8?b?" + base64.b64encode(data).decode("ascii") + "?="


def fold(name: str, value: str, eol: str = "\r\n") -> str:
    """``name: value`` folded before a space so lines stay within 78 characters
    (RFC 5322 section 2.2.3); a single word longer than that stays whole."""
    lines = [f"{name}:"]
    for word in value.split(" "):
        if len(lines[-1]) + 1 + len(word) > FOLD_WIDTH and lines[-1] != f"{name}:":
            lines.append("")
        lines[-1] += " " + word
    return eol.join(line.rstrip(" ") for line in lines)


def evidence_text(evidence: Sequence[tuple[str, float]]) -> str:
    """Short form of the strongest evidence: up to three tokens toward spam, then up to three
    toward ham, each as ``<signed weight> <token>``.

    Token text that is not printable ASCII without spaces is shown as an encoded word
    (RFC 2047), so the field stays 7-bit and always separated by spaces.
    """
    toward_spam = [(t, w) for t, w in evidence if w > 0][:EVIDENCE_EACH_WAY]
    toward_ham = [(t, w) for t, w in evidence if w < 0][:EVIDENCE_EACH_WAY]
    return " ".join(f"{w:+.2f} {_token_text(t)}" for t, w in toward_spam + toward_ham)


def _token_text(token: str) -> str:
    token = token[:_TOKEN_TEXT_MAX]
    if _PLAIN_TOKEN.fullmatch(token) and not token.startswith("=?"):
        return token
    return encoded_word(token)

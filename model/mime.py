"""Splitting raw RFC 5322 / MIME bytes into header fields and leaf parts, within limits.

A small parser of our own instead of the standard library's: it works on bytes, walks the
multipart tree with an explicit stack (no recursion, so nesting depth cannot exhaust the
interpreter), stops at the configured part, depth and size limits, and uses only forward
searches, so its time is linear in the (already capped) input.  It never raises on bad input.
"""

from __future__ import annotations

import binascii
import re
from dataclasses import dataclass, field
from functools import cached_property
from typing import Final
from urllib.parse import unquote

from .charsets import b64decode_lenient, decode_header_value, text_codec

MAX_FIELDS: Final = 200
MAX_FIELD_BYTES: Final = 16 * 1024
MAX_BOUNDARY: Final = 200
# RFC 5322 section 2.2: field-name is printable US-ASCII except ":"; continuation lines start
# with white space (section 2.2.3).  A line that is neither ends the header section.
# Possessive repeats (*+, Python 3.11): the same matches, but the regex engine keeps no
# backtracking marks, which cost about 100 bytes per header line (a 2 MB header of folded
# lines took 32 MB per pattern; tests/reliability/test_hostile.py).
_HEADER_SECTION: Final = re.compile(
    rb"(?:[\x21-\x39\x3b-\x7e]+[ \t]*:[^\n]*+(?:\n|$)(?:[ \t][^\n]*+(?:\n|$))*+)*+"
)
_FIELD: Final = re.compile(rb"(?m)^([\x21-\x39\x3b-\x7e]+)[ \t]*:([^\n]*+(?:\n[ \t][^\n]*+)*+)")
_FOLD: Final = re.compile(rb"\r?\n(?=[ \t])")
_PARAM: Final = re.compile(r';\s*([^\s=;"]+)\s*=\s*("(?:[^"\\]|\\.)*"?|[^;]*)')
_CONTINUATION: Final = re.compile(r"^(.+?)\*(\d{1,3})(\*?)$")
_MEDIA_TYPE: Final = re.compile(r"[a-z0-9!#$&^_.+\-]+/[a-z0-9!#$&^_.+\-]+")


@dataclass(frozen=True)
class Limits:
    """Bounds on the work spent on one message (see TokenizerOptions)."""

    part_bytes: int
    parts: int
    depth: int


@dataclass
class Part:
    """One MIME entity.

    Attributes
    ----------
    fields : list of (str, bytes)
        Lower-case field name and unfolded raw value, in order; ignored fields removed.
    content_type : str
        Lower-case "type/subtype" (text/plain when missing or malformed, RFC 2045 section 5.2).
    params : dict of str to str
        Content-Type parameters, lower-case names, RFC 2231 continuations joined.
    body : bytes
        The body as it appears in the message (still transfer-encoded).
    depth : int
        Nesting depth, 0 for the message itself.
    """

    fields: list[tuple[str, bytes]]
    content_type: str
    params: dict[str, str]
    body: bytes
    depth: int

    def field(self, name: str) -> bytes | None:
        """Raw value of the first field with this lower-case name, or None."""
        return self._first_values.get(name)

    @cached_property
    def _first_values(self) -> dict[str, bytes]:
        """Each name's first value.  The tokenizer asks for about ten names a message, most
        of them absent, and a scan of the fields for each cost more than this one pass."""
        return {name: value for name, value in reversed(self.fields)}

    def field_text(self, name: str) -> str:
        """Decoded value of the first such field ("" when absent)."""
        value = self.field(name)
        return decode_header_value(value[:MAX_FIELD_BYTES])[0] if value else ""

    @cached_property
    def transfer_encoding(self) -> str:
        value = self.field("content-transfer-encoding") or b""
        return value.decode("ascii", "replace").strip().lower()

    @cached_property
    def disposition(self) -> tuple[str, dict[str, str]]:
        """Lower-case disposition type and its parameters."""
        value = self.field_text("content-disposition")
        kind = value.partition(";")[0].strip().lower()
        return kind, parse_params(value)

    @cached_property
    def filename(self) -> str:
        """Attachment file name from Content-Disposition or the Content-Type name parameter."""
        name = self.disposition[1].get("filename") or self.params.get("name") or ""
        return decode_header_value(name.encode("utf-8", "replace"))[0] if "=?" in name else name

    def decoded_body(self, limit: int) -> tuple[bytes, bool, bool]:
        """Transfer-decoded body cut to ``limit`` bytes.

        Returns
        -------
        data : bytes
        truncated : bool
            More decoded bytes existed than the limit.
        damaged : bool
            Base64 with junk or a broken tail.
        """
        encoding = self.transfer_encoding
        body = self.body[: limit * 2 + 1024]
        damaged = False
        if encoding == "base64":
            data, damaged = b64decode_lenient(body)
        elif encoding == "quoted-printable":
            data = binascii.a2b_qp(body)
        else:
            data = body
        truncated = len(data) > limit or len(self.body) > len(body)
        return data[:limit], truncated, damaged


@dataclass
class Walk:
    """Result of walking a message: its top-level entity, the leaves, and notes on trouble."""

    top: Part
    leaves: list[Part] = field(default_factory=list)
    notes: set[str] = field(default_factory=set)
    part_count: int = 1
    content_types: list[str] = field(default_factory=list)


def parse_params(value: str) -> dict[str, str]:
    """Parameters of a structured field value (RFC 2045 section 5.1, RFC 2231 sections 3-4)."""
    params: dict[str, str] = {}
    pieces: dict[str, list[tuple[int, str, bool]]] = {}
    for name, raw in _PARAM.findall(value[:MAX_FIELD_BYTES]):
        name = name.lower()
        text = raw.strip()
        if text.startswith('"'):
            text = text[1:-1] if text.endswith('"') and len(text) > 1 else text[1:]
            text = text.replace('\\"', '"').replace("\\\\", "\\")
        continued = _CONTINUATION.match(name)
        if continued:
            key, index, star = continued.groups()
            pieces.setdefault(key, []).append((int(index), text, bool(star)))
        elif name.endswith("*"):
            params.setdefault(name[:-1], _rfc2231_value(text, first=True))
        else:
            params.setdefault(name, text)
    for key, parts in pieces.items():
        joined = "".join(
            _rfc2231_value(text, first=index == 0) if star else text
            for index, text, star in sorted(parts)
        )
        params.setdefault(key, joined)
    return params


def _rfc2231_value(text: str, first: bool) -> str:
    # RFC 2231 section 4: charset'language'percent-encoded, charset only on the first piece.
    charset = "utf-8"
    if first and text.count("'") >= 2:
        charset, _, text = text.split("'", 2)
    return unquote(text, encoding=text_codec(charset) or "utf-8", errors="replace")


def parse_entity(raw: bytes, depth: int, ignored: tuple[str, ...]) -> Part:
    """Split one entity into fields (minus those whose names start with ``ignored``) and body."""
    start = 0
    if raw.startswith(b"From "):  # mbox separator line, not a header field
        start = raw.find(b"\n") + 1 or len(raw)
    section = _HEADER_SECTION.match(raw, start)
    end = section.end() if section else start
    fields: list[tuple[str, bytes]] = []
    for match in _FIELD.finditer(raw, start, end):
        name = match.group(1).decode("ascii").lower()
        if not name.startswith(ignored):
            value = match.group(2)
            if b"\n" in value:  # folded: most fields are not, and the test costs far less
                value = _FOLD.sub(b"", value)
            fields.append((name, value.strip()))
            if len(fields) >= MAX_FIELDS:
                break
    if raw.startswith(b"\r\n", end):
        end += 2
    elif raw.startswith(b"\n", end):
        end += 1
    part = Part(fields, "text/plain", {}, raw[end:], depth)
    content_type = part.field_text("content-type")
    media = content_type.partition(";")[0].strip().lower()
    if _MEDIA_TYPE.fullmatch(media):
        part.content_type = media
    part.params = parse_params(content_type)
    return part


def split_multipart(body: bytes, boundary: bytes, limit: int) -> tuple[list[bytes], bool]:
    """Bodies of the parts between boundary delimiters (RFC 2046 section 5.1.1).

    Returns at most ``limit`` parts and whether any delimiter was found at all.
    """
    marker = b"--" + boundary
    found: list[int] = []  # start of each delimiter line, then end of that line
    pos = 0 if body.startswith(marker) else -1
    if pos < 0:
        pos = _next_delimiter(body, marker, 0)
    parts: list[bytes] = []
    seen = pos >= 0
    while pos >= 0 and len(parts) < limit:
        after = pos + len(marker)
        closing = body.startswith(b"--", after)
        line_end = body.find(b"\n", after)
        line_end = len(body) if line_end < 0 else line_end + 1
        if found:
            parts.append(_strip_newline(body[found[-1] : pos]))
        if closing:
            break
        found.append(line_end)
        pos = _next_delimiter(body, marker, line_end)
    if pos < 0 and found and len(parts) < limit:  # no closing delimiter: the rest is a part
        parts.append(body[found[-1] :])
    return parts, seen


def _next_delimiter(body: bytes, marker: bytes, start: int) -> int:
    pos = body.find(b"\n" + marker, max(start - 1, 0))
    while pos >= 0:
        after = body[pos + 1 + len(marker) : pos + 3 + len(marker)]
        if not after or after[:1] in b" \t\r\n" or after == b"--":
            return pos + 1
        pos = body.find(b"\n" + marker, pos + 1)
    return -1


def _strip_newline(chunk: bytes) -> bytes:
    # The CRLF before a delimiter belongs to the delimiter (RFC 2046 section 5.1.1).
    if chunk.endswith(b"\r\n"):
        return chunk[:-2]
    return chunk[:-1] if chunk.endswith(b"\n") else chunk


def walk(raw: bytes, limits: Limits, ignored: tuple[str, ...]) -> Walk:
    """Parse a message and collect its leaf parts depth-first in document order."""
    top = parse_entity(raw, 0, ignored)
    result = Walk(top)
    stack = [top]
    while stack:
        part = stack.pop()
        result.content_types.append(part.content_type)
        children = _children(part, limits, ignored, result)
        if children is None:
            result.leaves.append(part)
        else:
            stack.extend(reversed(children))
    return result


def _children(
    part: Part, limits: Limits, ignored: tuple[str, ...], result: Walk
) -> list[Part] | None:
    kind = part.content_type
    if not kind.startswith(("multipart/", "message/rfc822", "message/global")):
        return None
    if part.depth >= limits.depth:
        result.notes.add("limit-depth")
        return []
    budget = limits.parts - result.part_count
    if budget <= 0:
        result.notes.add("limit-parts")
        return []
    if kind.startswith("message/"):
        result.part_count += 1
        return [parse_entity(part.body, part.depth + 1, ignored)]
    boundary = part.params.get("boundary", "").encode("utf-8", "replace")[:MAX_BOUNDARY]
    bodies, seen = split_multipart(part.body, boundary, budget + 1) if boundary else ([], False)
    if not seen:
        result.notes.add("no-boundary")
        part.content_type = "text/plain"
        return None
    if len(bodies) > budget:
        result.notes.add("limit-parts")
        bodies = bodies[:budget]
    result.part_count += len(bodies)
    return [parse_entity(body, part.depth + 1, ignored) for body in bodies]

"""Bytes to text under declared, wrong or missing charsets, and RFC 2047 encoded words.

Order of attempts, cheapest first: pure ASCII; UTF-8 (valid UTF-8 with non-ASCII bytes is
almost never an accident, so it wins over a declared single-byte charset); the declared
charset; then, when many bytes are non-ASCII, detection by charset-normalizer on a bounded
sample; otherwise cp1252, which reads Western European text mis-declared as UTF-8.
"""

from __future__ import annotations

import binascii
import codecs
import re
from typing import Final

DETECT_SAMPLE: Final = 16 * 1024
_HIGH_BYTES: Final = bytes(range(0x80, 0x100))
_ASCII_BASED: Final = frozenset(
    {"", "us-ascii", "ascii", "utf-8", "utf8", "iso-8859-1", "latin-1", "latin1"}
    | {"windows-1252", "cp1252", "iso-8859-15", "default", "unknown-8bit", "x-unknown"}
)
# RFC 2047 section 2: encoded-word = "=?" charset "?" encoding "?" encoded-text "?=",
# with no white space inside; RFC 2231 section 5 allows "*language" after the charset.
_ENCODED_WORD: Final = re.compile(r"=\?([^?\s*]{1,40})(?:\*[^?\s]*)?\?([qQbB])\?([^?\s]*)\?=")
# Charsets whose text can be all-ASCII bytes yet mean something else.
_SEVEN_BIT: Final = re.compile(r"utf-?7|iso-?2022|hz|utf-?16|utf-?32|ucs")
_B64_JUNK: Final = re.compile(rb"[^A-Za-z0-9+/]")


def text_codec(charset: str) -> str | None:
    """Python codec name for a declared charset, or None when unknown or not a text codec."""
    name = charset.strip().strip("\"'").lower()
    if not name or len(name) > 40:
        return None
    try:
        info = codecs.lookup(name)
    except (LookupError, ValueError):
        return None
    return info.name if getattr(info, "_is_text_encoding", True) else None


def b64decode_lenient(data: bytes) -> tuple[bytes, bool]:
    """Decode base64, skipping junk and a broken tail.

    Returns
    -------
    decoded : bytes
        The bytes the valid quartets stand for.
    damaged : bool
        Whether characters outside the alphabet or a truncated tail were dropped.
    """
    body, _, tail = data.translate(None, b" \t\r\n").partition(b"=")
    cleaned = _B64_JUNK.sub(b"", body)
    extra = len(cleaned) % 4
    damaged = len(cleaned) != len(body) or extra == 1 or bool(tail.strip(b"="))
    if extra == 1:
        cleaned = cleaned[:-1]
    cleaned += b"=" * (-len(cleaned) % 4)
    try:
        return binascii.a2b_base64(cleaned), damaged
    except (binascii.Error, ValueError):
        return b"", True


def decode_bytes(data: bytes, charset: str = "") -> tuple[str, bool]:
    """Decode bytes to text, never failing.

    Parameters
    ----------
    data : bytes
        Raw (transfer-decoded) bytes.
    charset : str
        The declared charset, "" when none.

    Returns
    -------
    text : str
        The decoded text.
    mismatch : bool
        The declared charset did not fit the bytes (or was unknown) and another was used.
    """
    declared = charset.strip().strip("\"'").lower()
    if data.isascii():
        return _decode_ascii(data, declared)
    try:
        return data.decode("utf-8"), declared not in ("", "utf-8", "utf8", "us-ascii", "ascii")
    except UnicodeDecodeError:
        pass
    codec = text_codec(declared)
    if codec is not None and codec != "utf-8":
        try:
            return data.decode(codec), False
        except (UnicodeDecodeError, LookupError, ValueError):
            pass
    high = len(data) - len(data.translate(None, _HIGH_BYTES))
    if high * 5 > len(data):
        detected = _detect(data[:DETECT_SAMPLE])
        if detected is not None:
            try:
                return data.decode(detected, "replace"), True
            except (LookupError, ValueError, TypeError):
                pass
    return data.decode("cp1252", "replace"), bool(declared) or codec is None


def _decode_ascii(data: bytes, declared: str) -> tuple[str, bool]:
    if declared in _ASCII_BASED or not _SEVEN_BIT.match(declared):
        return data.decode("ascii"), False
    codec = text_codec(declared)
    try:
        return data.decode(codec or "ascii"), codec is None
    except (UnicodeDecodeError, LookupError, ValueError):
        return data.decode("ascii"), True


def _detect(sample: bytes) -> str | None:
    try:
        from charset_normalizer import from_bytes

        best = from_bytes(sample).best()
    except Exception:  # the detector is a heuristic; any failure means "no answer"
        return None
    return text_codec(best.encoding) if best is not None else None


def decode_header_value(raw: bytes) -> tuple[str, bool]:
    """Decode one unfolded header field body: 8-bit bytes, then RFC 2047 encoded words.

    Adjacent encoded words are joined without the white space between them (RFC 2047,
    section 6.2); consecutive words in one charset are decoded together so a character split
    across two words survives.

    Returns
    -------
    text : str
        The decoded value.
    encoded : bool
        Whether any encoded word was present.
    """
    text = raw.decode("ascii") if raw.isascii() else decode_bytes(raw)[0]
    if "=?" not in text:
        return text, False
    pieces: list[str] = []
    pending: list[bytes] = []
    pending_charset = ""
    pos = 0
    for match in _ENCODED_WORD.finditer(text):
        between = text[pos : match.start()]
        if between and not (pending and between.isspace()):
            _flush(pieces, pending, pending_charset)
            pieces.append(between)
        charset, kind, payload = match.groups()
        if pending and charset.lower() != pending_charset:
            _flush(pieces, pending, pending_charset)
        pending_charset = charset.lower()
        pending.append(_decode_word(kind, payload))
        pos = match.end()
    _flush(pieces, pending, pending_charset)
    pieces.append(text[pos:])
    return "".join(pieces), pos > 0


def _decode_word(kind: str, payload: str) -> bytes:
    data = payload.encode("ascii", "replace")
    if kind in "qQ":
        return binascii.a2b_qp(data, header=True)
    return b64decode_lenient(data)[0]


def _flush(pieces: list[str], pending: list[bytes], charset: str) -> None:
    if pending:
        pieces.append(decode_bytes(b"".join(pending), charset)[0])
        pending.clear()

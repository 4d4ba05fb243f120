"""Crafted hostile and broken messages, built at test time (the big ones would bloat the
repository); the small fixed ones live in tests/reliability/hostile/*.eml.

Every message is CRLF-terminated and has a unique Message-ID, so the sink's copy can be
matched to what was sent.  Sizes are chosen to go well past the tokenizer's own limits
(model/tokenize.py: 2 MB read per message, 64 parts, depth 8; model/mime.py: 200 fields).
"""

from __future__ import annotations

import base64
from collections.abc import Callable
from pathlib import Path

HOSTILE_DIR = Path(__file__).parent / "hostile"
MB = 1024 * 1024


def head(name: str, content_type: str = "text/plain; charset=utf-8", extra: str = "") -> bytes:
    return (
        "From: Priya Raman <priya.raman@harbourlane.example>\r\n"
        "To: Tobias Lindqvist <tobias.lindqvist@harbourlane.example>\r\n"
        f"Subject: hostile input: {name}\r\n"
        f"Message-ID: <hostile-{name}@harbourlane.example>\r\n"
        "MIME-Version: 1.0\r\n"
        f"Content-Type: {content_type}\r\n"
        f"{extra}"
        "\r\n"
    ).encode()


def deep_nesting(depth: int = 5000) -> bytes:
    """Multipart inside multipart, ``depth`` levels, each with its own boundary."""
    opening = b"".join(
        b'--b%d\r\nContent-Type: multipart/mixed; boundary="b%d"\r\n\r\n' % (i, i + 1)
        for i in range(depth)
    )
    closing = b"".join(b"\r\n--b%d--\r\n" % i for i in reversed(range(depth + 1)))
    leaf = b"--b%d\r\nContent-Type: text/plain\r\n\r\nthe bottom\r\n" % depth
    return head("deep-nesting", 'multipart/mixed; boundary="b0"') + opening + leaf + closing


def many_parts(parts: int = 50_000) -> bytes:
    one = b"--p\r\nContent-Type: text/plain\r\n\r\nkennel %d\r\n"
    body = b"".join(one % i for i in range(parts)) + b"--p--\r\n"
    return head("many-parts", 'multipart/mixed; boundary="p"') + body


def huge_header(fields: int = 100_000) -> bytes:
    lines = b"".join(b"Received: from relay%d.mail.example by mx\r\n" % i for i in range(fields))
    return head("huge-header", extra=lines.decode("ascii")) + b"short body\r\n"


def long_folded_field(kilobytes: int = 4096) -> bytes:
    """One Subject-like field folded over millions of bytes of continuation lines."""
    fold = "X-Ignored-Name: start\r\n" + " continued\r\n" * (kilobytes * 1024 // 12)
    return head("long-folded-field", extra=fold.replace("X-Ignored-Name", "Comments")) + b"body\r\n"


def endless_line(size: int = 8 * MB) -> bytes:
    return head("endless-line") + b"a" * size + b"\r\n"


def endless_header_line(size: int = 4 * MB) -> bytes:
    return head("endless-header-line", extra="Comments: " + "b" * size + "\r\n") + b"body\r\n"


def base64_blowup(size: int = 12 * MB) -> bytes:
    """A text part whose base64 decodes to ``size`` bytes of one word repeated."""
    data = base64.encodebytes(b"winner " * (size // 7)).replace(b"\n", b"\r\n")
    return head("base64-blowup", extra="Content-Transfer-Encoding: base64\r\n") + data


def base64_garbage(size: int = 2 * MB) -> bytes:
    """Base64 declared, then padding in the middle, wrong alphabet and half quanta."""
    chunk = b"QUJD=RE*&^%$==\r\nQQ\r\n====\r\n\x00\xff\r\n"
    return head("base64-garbage", extra="Content-Transfer-Encoding: base64\r\n") + chunk * (
        size // len(chunk)
    )


def html_nesting(depth: int = 200_000) -> bytes:
    markup = b"<div><span><b>" * depth + b"hidden?" + b"</b></span></div>" * depth
    return head("html-nesting", "text/html; charset=utf-8") + markup + b"\r\n"


def unicode_pathology() -> bytes:
    """Combining marks by the hundred thousand, bidi overrides, zero-width runs, lone
    surrogates as UTF-8 (invalid), overlong encodings and every plane's edge."""
    text = (
        "e"
        + "\u0301" * 200_000
        + "\r\n"
        + "\u202e" * 50_000
        + "gnidnoces\r\n"
        + ("\u200b" * 3 + "v\u200ci\u200da\u2060g") * 20_000
        + "\r\n"
        + "".join(chr(c) for c in range(0x10FFF0, 0x110000))
        + "\r\n"
        + "\ufeff\ufffe\uffff" * 10_000
        + "\r\n"
    )
    raw = text.encode("utf-8")
    raw += b"\xed\xa0\x80\xed\xbf\xbf" * 10_000 + b"\xc0\xaf\xe0\x80\xaf" * 10_000 + b"\r\n"
    return head("unicode-pathology") + raw


def encoded_words(count: int = 60_000) -> bytes:
    subject = " ".join(f"=?utf-8?b?{base64.b64encode(b'vet').decode()}?=" for _ in range(count))
    return (
        head("encoded-words", extra=f"Comments: {subject}\r\n").replace(
            b"Subject: hostile input: encoded-words", b"Subject: " + subject.encode()
        )
        + b"body\r\n"
    )


def nul_bytes(size: int = 1 * MB) -> bytes:
    return head("nul-bytes", extra="Comments: a\x00b\x00c\r\n") + (
        b"\x00kennel\x00\r\n" * (size // 10)
    )


def missing_boundary() -> bytes:
    return head("missing-boundary", "multipart/mixed") + b"--\r\n--x\r\nno boundary given\r\n"


def duplicated_boundaries(parts: int = 20_000) -> bytes:
    """Two boundary parameters, the same boundary opening nested parts, no closing line."""
    content_type = 'multipart/mixed; boundary="dup"; boundary="dup2"'
    inner = b'--dup\r\nContent-Type: multipart/alternative; boundary="dup"\r\n\r\n'
    return head("duplicated-boundaries", content_type) + inner * parts + b"text\r\n"


def boundary_prefixes(parts: int = 100_000) -> bytes:
    """Lines that start like the boundary but are not it (the delimiter search's worst case)."""
    body = b"--pp" + b"\r\n--ppx" * parts + b"\r\n--pp--\r\n"
    return head("boundary-prefixes", 'multipart/mixed; boundary="pp"') + body


CRAFTED: dict[str, Callable[[], bytes]] = {
    "deep-nesting": deep_nesting,
    "many-parts": many_parts,
    "huge-header": huge_header,
    "long-folded-field": long_folded_field,
    "endless-line": endless_line,
    "endless-header-line": endless_header_line,
    "base64-blowup": base64_blowup,
    "base64-garbage": base64_garbage,
    "html-nesting": html_nesting,
    "unicode-pathology": unicode_pathology,
    "encoded-words": encoded_words,
    "nul-bytes": nul_bytes,
    "missing-boundary": missing_boundary,
    "duplicated-boundaries": duplicated_boundaries,
    "boundary-prefixes": boundary_prefixes,
}


def fixed_messages() -> dict[str, bytes]:
    """The small crafted messages kept as files."""
    return {path.stem: path.read_bytes() for path in sorted(HOSTILE_DIR.glob("*.eml"))}

"""Malformed messages are relayed intact and tagged; the filter never refuses what it can pass.

The folder ``malformed/`` holds messages we wrote by hand (stored with LF line endings and
sent with CRLF, as SMTP carries them):

- broken_boundary.eml      a boundary that never closes, a misspelt and a foreign delimiter
- bad_base64.eml           base64 parts with junk characters and misplaced padding
- wrong_charset.eml        Latin-1 and invalid UTF-8 under a us-ascii label; broken encoded words
- unknown_charset.eml      a charset nobody knows, quoted-printable with a bad escape
- nul_bytes.eml            NUL and control bytes in a header and in the body
- eight_bit_headers.eml    raw 8-bit bytes in header fields
- no_body_separator.eml    header fields only, no empty line
- garbage_headers.eml      lines that are not fields, an empty name, multipart without boundary
- nested_multipart.eml     ten levels of multipart/mixed

Two more are generated at test time rather than stored: a 2 MB line and 200 nested levels.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from smtp_helpers import SPAM, FakeJudge, daemon_settings, running_daemon, send

pytestmark = pytest.mark.timeout(60)

FOLDER = Path(__file__).parent / "malformed"
TAGS = (
    b"Mailweir-Verdict: spam\r\n"
    b"Mailweir-Score: 0.9987\r\n"
    b"Mailweir-Id: 0123456789abcdef\r\n"
    b"Mailweir-Evidence: +3.20 cheap -1.50 invoice\r\n"
)


def crlf(raw: bytes) -> bytes:
    return raw.replace(b"\r\n", b"\n").replace(b"\n", b"\r\n")


def deeply_nested(depth: int) -> bytes:
    head = b"From: Orders <orders@vetsupply.example>\r\nSubject: deep\r\nMIME-Version: 1.0\r\n"
    opening = b"".join(
        b'Content-Type: multipart/mixed; boundary="d%d"\r\n\r\n--d%d\r\n' % (n, n)
        for n in range(depth)
    )
    closing = b"".join(b"--d%d--\r\n" % n for n in reversed(range(depth)))
    return head + opening + b"Content-Type: text/plain\r\n\r\ninnermost\r\n" + closing


def generated() -> dict[str, bytes]:
    long_line = b"From: Orders <orders@vetsupply.example>\r\nSubject: long\r\n\r\n"
    return {
        "two_megabyte_line": long_line + b"Q" * (2 * 1024 * 1024) + b"\r\n",
        "nested_200_levels": deeply_nested(200),
    }


CASES = {path.name: crlf(path.read_bytes()) for path in sorted(FOLDER.glob("*.eml"))}


def test_malformed_folder_has_the_promised_cases():
    assert len(CASES) >= 9


@pytest.mark.parametrize("name", [*CASES, *generated()])
async def test_malformed_message_relayed_intact_and_tagged(next_hop, name):
    raw = CASES.get(name) or generated()[name]
    settings = daemon_settings(next_hop.address, spam_action="tag")
    async with running_daemon(settings, judge=FakeJudge(SPAM)) as daemon:
        sent = await send(daemon.port, raw, mail_options=["BODY=8BITMIME"])
    assert sent.data is not None and sent.data[0] == 250
    assert next_hop.deliveries[0].content == TAGS + raw


@pytest.mark.parametrize("name", [*CASES, *generated()])
def test_malformed_message_tokenizes_without_raising(name):
    # The tokenizer's promise (DESIGN.md: "it never raises on bad input"), checked here on
    # the same folder the relay tests use.
    tokenize = pytest.importorskip("mailweir.model.tokenize", reason="tokenizer not built yet")
    raw = CASES.get(name) or generated()[name]
    assert isinstance(tokenize.tokens(raw), list)

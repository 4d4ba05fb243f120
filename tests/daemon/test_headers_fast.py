"""remove_own_fields' quick check (no "mailweir-" in the header) against the field-by-field path."""

from __future__ import annotations

import itertools

from mailweir.daemon import headers

PIECES = [b"\r\n", b"\n", b" ", b"Mailweir-Score: 1", b"X-Note: mailweir-ish", b"Subject: a", b"b"]


def slow_path(raw: bytes) -> bytes:
    """The field-by-field path, with the quick check bypassed."""
    lines, body_at = headers._split_header(raw)
    kept, dropping = [], False
    for line in lines:
        name = headers._field_name(line)
        if line[:1] not in (b" ", b"\t"):
            dropping = name is not None and name.startswith(b"mailweir-")
        if not dropping:
            kept.append(line)
    return b"".join(kept) + raw[body_at:]


def test_remove_own_fields_quick_check_agrees_on_every_short_message() -> None:
    for size in range(6):
        for combo in itertools.product(PIECES, repeat=size):
            raw = b"".join(combo)
            assert headers.remove_own_fields(raw) == slow_path(raw), raw
            assert headers._header_length(raw) == headers._split_header(raw)[1], raw


def test_remove_own_fields_leaves_body_mentions_alone() -> None:
    raw = b"Subject: hi\r\n\r\nMailweir-Score: 0.99\r\n"
    assert headers.remove_own_fields(raw) is raw

"""Finding the original inside a feedback message (daemon/forwarded.py).

The messages are written here, in the Harbour Lane Veterinary Practice scenario.  The inline
forward layouts imitate what common mail programs write above a forwarded message (from
memory, no source); the Resent-* block follows RFC 5322 section 3.6.6 and the attachment
follows RFC 2046 section 5.2.1 (message/rfc822).  The builders are shared with the end-to-end
feedback tests.
"""

from __future__ import annotations

import base64

import pytest

from mailweir.daemon import actions, headers, scenario
from mailweir.daemon.forwarded import MAX_ORIGINALS, find_originals, tracking_id
from mailweir.model.hashing import hash_tokens
from mailweir.model.tokenize import tokens

TOBIAS = "Tobias Lindqvist <tobias.lindqvist@harbourlane.example>"
REPORT_WANTED = "report-wanted@harbourlane.example"
TRACKING = "0ljq3k2c5g1a9b7e"


def delivered(raw: bytes, tracking: str = TRACKING, band: str = "spam") -> bytes:
    """``raw`` as mailweir tags it on the way in, with its own fields on top."""
    fields = actions.tag_fields(band, 0.9973, tracking, (("remit", 2.1), ("linen", -1.2)))
    return headers.prepend_fields(raw, fields)


def _head(subject: str, content_type: str) -> bytes:
    return (
        f"From: {TOBIAS}\r\nTo: {REPORT_WANTED}\r\nSubject: {subject}\r\n"
        "Date: Mon, 30 Nov 2026 10:02:00 +0000\r\n"
        "Message-ID: <fwd.20261130@harbourlane.example>\r\nMIME-Version: 1.0\r\n"
        f"Content-Type: {content_type}\r\n\r\n"
    ).encode()


def as_attachment(
    *originals: bytes, encoding: str = "", eml: bool = False, boundary: str = "b0"
) -> bytes:
    """Forwarded as attachment(s): a note, then one message/rfc822 part per original."""
    mark = b"--" + boundary.encode()
    parts = [mark + b"\r\nContent-Type: text/plain; charset=utf-8\r\n\r\nThis one is ours.\r\n"]
    for index, original in enumerate(originals):
        kind = b"application/octet-stream" if eml else b"message/rfc822"
        head = mark + b"\r\nContent-Type: " + kind + b"\r\n"
        if eml:
            head += f'Content-Disposition: attachment; filename="reminder-{index}.eml"\r\n'.encode()
        body = original
        if encoding == "base64":
            head += b"Content-Transfer-Encoding: base64\r\n"
            body = base64.encodebytes(original).replace(b"\n", b"\r\n")
        parts.append(head + b"\r\n" + body + b"\r\n")
    content = f'multipart/mixed; boundary="{boundary}"'
    return _head("Fwd: Payment reminder", content) + b"".join(parts) + mark + b"--\r\n"


INLINE_MARKERS = {
    "webmail": "---------- Forwarded message ---------",
    "desktop": "-------- Forwarded Message --------",
    "office": "-----Original Message-----",
    "phone": "Begin forwarded message:",
}


def as_inline(original: bytes, style: str = "webmail", *, quoted: bool = False) -> bytes:
    """Forwarded inline: the user's note, a separator line, the quoted fields, the text."""
    head, _, body = original.partition(b"\r\n\r\n")
    fields = dict(
        line.split(": ", 1) for line in head.decode().split("\r\n") if not line[:1].isspace()
    )
    date_name = "Sent" if style == "office" else "Date"
    block = [
        INLINE_MARKERS[style],
        f"From: {fields['From']}",
        f"{date_name}: Monday, 30 November 2026 09:15",
        f"To: {fields['To']}",
        f"Subject: {fields['Subject']}",
    ]
    if "Mailweir-Id" in fields:
        block.append(f"Mailweir-Id: {fields['Mailweir-Id']}")
    text = "\r\n".join(block) + "\r\n\r\n" + body.decode()
    if quoted:
        text = "\r\n".join("> " + line if line else ">" for line in text.split("\r\n"))
    note = "Hi, this reminder is genuine, please stop filing it as junk.\r\n\r\n"
    content = "text/plain; charset=utf-8"
    return _head("Fwd: Payment reminder", content) + (note + text).encode()


def as_inline_html(original: bytes) -> bytes:
    """Forwarded inline by a program that writes only HTML."""
    head, _, body = original.partition(b"\r\n\r\n")
    fields = dict(line.split(": ", 1) for line in head.decode().split("\r\n"))
    paragraphs = "".join(f"<p>{p}</p>" for p in body.decode().split("\r\n\r\n"))
    markup = (
        "<html><body><div>Genuine, please.</div><div><br></div>"
        "<div>---------- Forwarded message ---------<br>"
        f"From: {fields['From'].replace('<', '&lt;').replace('>', '&gt;')}<br>"
        f"Subject: {fields['Subject']}<br>"
        f"Mailweir-Id: {fields.get('Mailweir-Id', '')}<br></div><br>"
        f"{paragraphs}</body></html>"
    )
    return _head("Fwd: reminder", "text/html; charset=utf-8") + markup.encode() + b"\r\n"


def as_resent(original: bytes) -> bytes:
    """Redirected ("bounced") by the user's mail program (RFC 5322 section 3.6.6)."""
    block = (
        f"Resent-From: {TOBIAS}\r\n"
        f"Resent-To: {REPORT_WANTED}\r\n"
        "Resent-Date: Mon, 30 Nov 2026 10:05:00\r\n +0000\r\n"  # folded on purpose
        "Resent-Message-ID: <resent.4471@harbourlane.example>\r\n"
    )
    return block.encode() + original


def reminder() -> bytes:
    return delivered(scenario.overdue_reminder().raw)


def _hashes(raw: bytes) -> list[int]:
    return hash_tokens(tokens(raw)).tolist()


# -- attachments -----------------------------------------------------------------------------


def test_forwarded_attachment_is_the_original_byte_for_byte() -> None:
    original = reminder()
    (found,) = find_originals(as_attachment(original))
    assert found.form == "attachment"
    assert found.raw == original
    assert found.tracking_id == TRACKING


def test_forwarded_attachment_base64_is_decoded() -> None:
    # RFC 2046 section 5.2.1 allows only 7bit, 8bit or binary here; some programs encode anyway.
    original = reminder()
    (found,) = find_originals(as_attachment(original, encoding="base64"))
    assert found.raw.rstrip(b"\r\n") == original.rstrip(b"\r\n")
    assert found.tracking_id == TRACKING


def test_forwarded_attachment_as_eml_file() -> None:
    original = reminder()
    (found,) = find_originals(as_attachment(original, eml=True))
    assert (found.form, found.raw, found.tracking_id) == ("attachment", original, TRACKING)


def test_forwarded_several_attachments_give_several_originals() -> None:
    spam = [delivered(m.raw, f"id{i:014d}") for i, m in enumerate(scenario.generate(3, "spam", 7))]
    found = find_originals(as_attachment(*spam))
    assert [f.raw for f in found] == spam
    assert [f.tracking_id for f in found] == [
        "id00000000000000",
        "id00000000000001",
        "id00000000000002",
    ]


def test_forwarded_attachments_are_capped() -> None:
    many = [delivered(scenario.overdue_reminder().raw, f"id{i}") for i in range(MAX_ORIGINALS + 5)]
    assert len(find_originals(as_attachment(*many))) == MAX_ORIGINALS


def test_forwarded_attachment_inside_attachment_takes_the_outer_one() -> None:
    inner = reminder()
    outer = delivered(as_attachment(inner, boundary="inner"), "outer00000000000", band="ham")
    (found,) = find_originals(as_attachment(outer))
    assert found.raw == outer
    assert found.tracking_id == "outer00000000000"


def test_forwarded_whole_message_as_rfc822() -> None:
    # Some tools send the original as the entire body, typed message/rfc822.
    original = reminder()
    (found,) = find_originals(_head("Misfiled", "message/rfc822") + original)
    assert (found.form, found.raw, found.tracking_id) == ("attachment", original, TRACKING)


# -- inline ----------------------------------------------------------------------------------


@pytest.mark.parametrize("style", sorted(INLINE_MARKERS))
def test_forwarded_inline_rebuilds_fields_and_text(style: str) -> None:
    original = reminder()
    (found,) = find_originals(as_inline(original, style))
    assert found.form == "inline"
    assert found.tracking_id == TRACKING
    text = found.raw.decode()
    assert "Subject: Payment reminder: invoice 20417 overdue\r\n" in text
    assert "From: Coastal Linen Service <accounts@coastal-linen.example>\r\n" in text
    assert "Date: Monday, 30 November 2026 09:15\r\n" in text  # Outlook's "Sent:" too
    assert "FINAL NOTICE: invoice 20417" in text
    assert "please stop filing it as junk" not in text  # the user's own note is not the original
    assert "Mailweir-" not in text


def test_forwarded_inline_keeps_nearly_every_token() -> None:
    plain = scenario.overdue_reminder().raw
    (found,) = find_originals(as_inline(delivered(plain)))
    original, rebuilt = set(_hashes(plain)), set(_hashes(found.raw))
    assert len(rebuilt & original) / len(rebuilt) > 0.9


def test_forwarded_inline_quoted_with_angle_brackets() -> None:
    (found,) = find_originals(as_inline(reminder(), quoted=True))
    assert found.tracking_id == TRACKING
    assert b"\r\nDear Tobias," in found.raw
    assert b"> " not in found.raw


def test_forwarded_inline_without_id_has_none() -> None:
    (found,) = find_originals(as_inline(scenario.overdue_reminder().raw))
    assert found.form == "inline"
    assert found.tracking_id is None


def test_forwarded_inline_html_only() -> None:
    (found,) = find_originals(as_inline_html(reminder()))
    assert found.form == "inline"
    assert found.tracking_id == TRACKING
    assert b"Subject: Payment reminder: invoice 20417 overdue\r\n" in found.raw
    assert b"FINAL NOTICE" in found.raw


# -- resent and the message itself -------------------------------------------------------------


def test_forwarded_resent_drops_only_the_resent_fields() -> None:
    original = reminder()
    (found,) = find_originals(as_resent(original))
    assert (found.form, found.raw, found.tracking_id) == ("resent", original, TRACKING)


def test_forwarded_resent_wins_over_an_attachment_inside() -> None:
    # A redirected message that itself carries an attached message is the original as a whole.
    original = delivered(as_attachment(scenario.overdue_reminder().raw), "whole00000000000")
    (found,) = find_originals(as_resent(original))
    assert (found.form, found.tracking_id) == ("resent", "whole00000000000")


def test_forwarded_message_with_our_id_is_its_own_original() -> None:
    original = reminder()
    (found,) = find_originals(original)
    assert (found.form, found.raw, found.tracking_id) == ("itself", original, TRACKING)


# -- nothing to find -------------------------------------------------------------------------


def test_forwarded_plain_note_has_no_original() -> None:
    note = _head("Junk again", "text/plain") + b"Priya, we got another parcel scam today.\r\n"
    assert find_originals(note) == []


def test_forwarded_reply_quoting_without_separator_has_no_original() -> None:
    body = b"> Dear Tobias,\r\n> FINAL NOTICE: invoice 20417\r\n\r\nThis is real.\r\n"
    assert find_originals(_head("Re: reminder", "text/plain") + body) == []


@pytest.mark.parametrize(
    "raw",
    [
        b"",
        b"\x00\xff\xfe garbage",
        b"Content-Type: multipart/mixed; boundary=\r\n\r\n--\r\n",
        b"Content-Type: message/rfc822\r\n\r\n",
        b"Content-Type: multipart/mixed; boundary=x\r\n\r\n--x\r\nContent-Type: message/rfc822\r\n",
        "Subject: caf\u00e9\r\n\r\n-----Original Message-----\r\n".encode(),
    ],
)
def test_forwarded_malformed_input_never_raises(raw: bytes) -> None:
    assert isinstance(find_originals(raw), list)


def test_forwarded_tracking_id_must_be_well_formed() -> None:
    assert tracking_id(b"Mailweir-Id: 0ljq3k2c5g1a9b7e\r\n\r\nx") == "0ljq3k2c5g1a9b7e"
    assert tracking_id(b"Mailweir-Id: not an id; drop table\r\n\r\nx") is None
    assert tracking_id(b"Subject: no id\r\n\r\nx") is None

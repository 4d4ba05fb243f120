"""Header surgery: byte-exact except for what we mean to change.

Oracles: RFC 5322 section 2.2.3 (unfolding removes each CRLF that precedes white space) and
Python's email.header.decode_header for RFC 2047 encoded words.
"""

from __future__ import annotations

from email.header import decode_header, make_header

import pytest

from mailweir.daemon import headers

RAW = (
    b"Received: from mx.mail.example by filter.harbourlane.example\r\n"
    b"From: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"MAILWEIR-Verdict: ham\r\n"
    b"Subject: Appointment for Biscuit\r\n"
    b"mailweir-score: 0.0001\r\n"
    b"\t0.0002\r\n"
    b"  0.0003\r\n"
    b"Mailweir-Id : forged\r\n"
    b"Mailweirdness: not ours\r\n"
    b"X-Mailweir-Verdict: not ours either\r\n"
    b"\r\n"
    b"Mailweir-Verdict: this is body text and stays\r\n"
)


def unfold(text: str) -> str:
    # RFC 5322 section 2.2.3: "unfolding is accomplished by simply removing any CRLF that is
    # immediately followed by WSP".
    return text.replace("\r\n ", " ").replace("\r\n\t", "\t")


def test_remove_own_fields_drops_every_case_and_continuation():
    expected = (
        b"Received: from mx.mail.example by filter.harbourlane.example\r\n"
        b"From: Priya Raman <priya.raman@harbourlane.example>\r\n"
        b"Subject: Appointment for Biscuit\r\n"
        b"Mailweirdness: not ours\r\n"
        b"X-Mailweir-Verdict: not ours either\r\n"
        b"\r\n"
        b"Mailweir-Verdict: this is body text and stays\r\n"
    )
    assert headers.remove_own_fields(RAW) == expected


def test_remove_own_fields_returns_message_unchanged_without_own_fields():
    raw = b"From: a@mail.example\r\nSubject: x\r\n\r\nbody\x00\xff\r\n"
    assert headers.remove_own_fields(raw) is raw


def test_remove_own_fields_handles_lf_only_and_header_only_messages():
    assert headers.remove_own_fields(b"A: 1\nMailweir-Id: x\n y\nB: 2\n") == b"A: 1\nB: 2\n"
    assert headers.remove_own_fields(b"Mailweir-Id: x") == b""


def test_remove_own_fields_keeps_leading_continuation_and_junk_lines():
    raw = b" stray continuation\r\nnot a field line\r\nMailweir-Id: x\r\n\r\nbody\r\n"
    assert (
        headers.remove_own_fields(raw) == b" stray continuation\r\nnot a field line\r\n\r\nbody\r\n"
    )


def test_prepend_fields_puts_fields_on_top_and_keeps_the_rest():
    raw = b"Subject: x\r\n\r\nbody\r\n"
    out = headers.prepend_fields(raw, [("Mailweir-Verdict", "spam"), ("Mailweir-Id", "abc")])
    assert out == b"Mailweir-Verdict: spam\r\nMailweir-Id: abc\r\n" + raw


def test_prepend_fields_uses_lf_when_the_message_does():
    out = headers.prepend_fields(b"Subject: x\n\nbody\n", [("Mailweir-Id", "abc")])
    assert out == b"Mailweir-Id: abc\nSubject: x\n\nbody\n"


def test_fold_keeps_lines_within_78_and_unfolds_to_the_value():
    value = ", ".join(f"patient{i}@harbourlane.example" for i in range(12))
    folded = headers.fold("Mailweir-Original-Recipients", value)
    assert all(len(line) <= 78 for line in folded.split("\r\n"))
    assert unfold(folded) == f"Mailweir-Original-Recipients: {value}"


def test_prefix_subject_inserts_once():
    once = headers.prefix_subject(RAW, "[SPAM]")
    assert b"Subject: [SPAM] Appointment for Biscuit\r\n" in once
    assert once.replace(b"[SPAM] ", b"", 1) == RAW
    assert headers.prefix_subject(once, "[SPAM]") == once


def test_prefix_subject_without_subject_field_changes_nothing():
    raw = b"From: a@mail.example\r\n\r\nSubject: in the body\r\n"
    assert headers.prefix_subject(raw, "[SPAM]") is raw


def test_prefix_subject_encodes_non_ascii_prefix():
    out = headers.prefix_subject(b"Subject: Rechnung\r\n\r\n", "[Verdächtig]")
    subject = out.split(b"\r\n")[0].decode("ascii")[len("Subject: ") :]
    assert str(make_header(decode_header(subject))) == "[Verdächtig] Rechnung"


def test_evidence_text_lists_three_each_way_strongest_first():
    evidence = [
        ("cheap", 3.1),
        ("invoice", -2.5),
        ("pills", 2.0),
        ("winner", 1.5),
        ("extra", 1.0),
        ("biscuit", -1.2),
    ]
    assert headers.evidence_text(evidence) == (
        "+3.10 cheap +2.00 pills +1.50 winner -2.50 invoice -1.20 biscuit"
    )


@pytest.mark.parametrize("token", ["Tierärztin", "two words", "=?fake?=", "€€€"])
def test_evidence_text_is_seven_bit_and_decodes_back(token):
    text = headers.evidence_text([(token, 1.25)])
    assert text.isascii()
    assert str(make_header(decode_header(text))).endswith(token)


def test_prepend_fields_keeps_undecodable_address_bytes():
    # aiosmtpd hands over invalid UTF-8 in an address as surrogate escapes.
    address = b"m\xfcller@harbourlane.example".decode("utf-8", "surrogateescape")
    out = headers.prepend_fields(b"\r\nbody\r\n", [("Mailweir-Original-Recipients", address)])
    assert out == b"Mailweir-Original-Recipients: m\xfcller@harbourlane.example\r\n\r\nbody\r\n"


def test_evidence_text_survives_lone_surrogates():
    assert headers.evidence_text([("bad\udcfftoken", 1.0)]).isascii()

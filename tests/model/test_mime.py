"""MIME structure, encoded words, parameters and charsets, checked against RFC examples."""

from __future__ import annotations

import base64

import pytest

from mailweir.model.charsets import b64decode_lenient, decode_bytes, decode_header_value
from mailweir.model.mime import Limits, parse_entity, parse_params, split_multipart, walk

LIMITS = Limits(part_bytes=256 * 1024, parts=64, depth=8)


# RFC 2047, section 8: "encoded form" -> "displayed as".  The RFC shows them inside comments
# "( ... )"; the white-space rules for encoded words are the same in unstructured text.
@pytest.mark.parametrize(
    ("encoded", "shown"),
    [
        ("(=?ISO-8859-1?Q?a?=)", "(a)"),
        ("(=?ISO-8859-1?Q?a?= b)", "(a b)"),
        ("(=?ISO-8859-1?Q?a?= =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a?=  =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a?=\r\n    =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a_b?=)", "(a b)"),
        ("(=?ISO-8859-1?Q?a?= =?ISO-8859-2?Q?_b?=)", "(a b)"),
    ],
)
def test_decode_header_value_rfc2047_section8(encoded: str, shown: str) -> None:
    # Folding (CRLF + white space) is removed before decoding, as parse_entity does.
    raw = encoded.replace("\r\n", "").encode("ascii")
    assert decode_header_value(raw) == (shown, True)


def test_decode_header_value_rfc2047_section8_folded_by_parser() -> None:
    # Same section-8 example, but folded inside a real header section.
    part = parse_entity(b"Subject: (=?ISO-8859-1?Q?a?=\r\n    =?ISO-8859-1?Q?b?=)\r\n\r\n", 0, ())
    assert part.field_text("subject") == "(ab)"


def test_decode_header_value_rfc2047_section8_keith_moore() -> None:
    # RFC 2047, section 8, first example: From: =?US-ASCII?Q?Keith_Moore?= <moore@...>
    text, encoded = decode_header_value(b"=?US-ASCII?Q?Keith_Moore?= <km@mail.example>")
    assert (text, encoded) == ("Keith Moore <km@mail.example>", True)


def test_decode_header_value_rfc2047_section8_iso8859_1_name() -> None:
    # RFC 2047, section 8: =?ISO-8859-1?Q?Andr=E9?= Pirard -> "André Pirard"
    assert decode_header_value(b"=?ISO-8859-1?Q?Andr=E9?= Pirard")[0] == "André Pirard"


def test_decode_header_value_rfc2047_section8_base64_subject() -> None:
    # RFC 2047, section 8: the two base64 words of the Subject decode to
    # "If you can read this you understand the example."
    value = (
        b"=?ISO-8859-1?B?SWYgeW91IGNhbiByZWFkIHRoaXMgeW8=?= "
        b"=?ISO-8859-2?B?dSB1bmRlcnN0YW5kIHRoZSBleGFtcGxlLg==?="
    )
    assert decode_header_value(value)[0] == "If you can read this you understand the example."


def test_decode_header_value_utf8_split_across_words() -> None:
    # A character split over two words (not allowed by RFC 2047 section 5, seen in practice).
    assert decode_header_value(b"=?utf-8?q?=E2=82?= =?utf-8?q?=AC?=")[0] == "€"


def test_decode_header_value_bad_charset_and_raw_8bit() -> None:
    assert decode_header_value(b"=?x-nonsense?Q?Dr=2E_Okafor?=")[0] == "Dr. Okafor"
    assert decode_header_value("Caf\u00e9 order".encode())[0] == "Café order"
    assert decode_header_value("Caf\u00e9 order".encode("latin-1"))[0] == "Café order"


def test_parse_params_rfc2231_examples() -> None:
    # RFC 2231, section 4 (charset and language) and section 4.1 (continuations + encoding).
    single = "application/x-stuff; title*=us-ascii'en-us'This%20is%20%2A%2A%2Afun%2A%2A%2A"
    assert parse_params(single)["title"] == "This is ***fun***"
    joined = (
        "application/x-stuff; title*0*=us-ascii'en'This%20is%20even%20more%20; "
        'title*1*=%2A%2A%2Afun%2A%2A%2A%20; title*2="isn\'t it!"'
    )
    assert parse_params(joined)["title"] == "This is even more ***fun*** isn't it!"


def test_parse_params_quoted_and_plain() -> None:
    params = parse_params('text/plain; charset="utf-8"; format=flowed; name="a;b.pdf"')
    assert params == {"charset": "utf-8", "format": "flowed", "name": "a;b.pdf"}


def test_split_multipart_rfc2046_example() -> None:
    # RFC 2046, section 5.1.1, the "simple boundary" example body (preamble and epilogue
    # ignored; the CRLF before each delimiter belongs to the delimiter).
    body = (
        b"This is the preamble.  It is to be ignored.\r\n"
        b"\r\n--simple boundary\r\n"
        b"\r\nThis is implicitly typed plain US-ASCII text.\r\n"
        b"It does NOT end with a linebreak.\r\n"
        b"--simple boundary\r\n"
        b"Content-type: text/plain; charset=us-ascii\r\n\r\n"
        b"This is explicitly typed plain US-ASCII text.\r\n"
        b"It DOES end with a linebreak.\r\n\r\n"
        b"--simple boundary--\r\n\r\nThis is the epilogue.  It is also to be ignored.\r\n"
    )
    parts, seen = split_multipart(body, b"simple boundary", 10)
    assert seen
    assert [parse_entity(p, 1, ()).body for p in parts] == [
        b"This is implicitly typed plain US-ASCII text.\r\nIt does NOT end with a linebreak.",
        b"This is explicitly typed plain US-ASCII text.\r\nIt DOES end with a linebreak.\r\n",
    ]
    assert parse_entity(parts[1], 1, ()).params["charset"] == "us-ascii"


def test_split_multipart_ignores_longer_boundary_lookalike() -> None:
    body = b"--b\nA\n--bx\nnot a delimiter\n--b--\n"
    parts, _ = split_multipart(body, b"b", 10)
    assert parts == [b"A\n--bx\nnot a delimiter"]


def test_split_multipart_missing_close_delimiter_keeps_last_part() -> None:
    parts, _ = split_multipart(b"--b\n\nfirst\n--b\n\nsecond, never closed\n", b"b", 10)
    assert [p.strip() for p in parts] == [b"first", b"second, never closed"]


def test_parse_entity_lf_crlf_and_mbox_line() -> None:
    for newline in (b"\n", b"\r\n"):
        raw = newline.join([b"From x@mail.example Tue Dec  1 09:00:00 2026", b"Subject: hi"])
        part = parse_entity(raw + newline + newline + b"body", 0, ())
        assert part.field_text("subject") == "hi"
        assert part.body == b"body"


def test_parse_entity_text_without_headers_is_body() -> None:
    part = parse_entity(b"Hello Priya, the kennel is booked.\n", 0, ())
    assert part.fields == []
    assert part.body.startswith(b"Hello Priya")


def test_parse_entity_drops_ignored_prefixes() -> None:
    raw = b"Subject: a\nMailweir-Verdict: spam\nX-Corpus-Label: spam\n\nbody"
    part = parse_entity(raw, 0, ("mailweir-", "x-corpus-"))
    assert [name for name, _ in part.fields] == ["subject"]


def test_walk_nested_message_rfc822() -> None:
    inner = b"Subject: inner\nContent-Type: text/plain\n\nforwarded words\n"
    raw = (
        b'Content-Type: multipart/mixed; boundary="o"\n\n--o\nContent-Type: text/plain\n\n'
        b"see attached\n--o\nContent-Type: message/rfc822\n\n" + inner + b"--o--\n"
    )
    tree = walk(raw, LIMITS, ())
    assert [leaf.body.strip() for leaf in tree.leaves] == [b"see attached", b"forwarded words"]
    assert tree.content_types == ["multipart/mixed", "text/plain", "message/rfc822", "text/plain"]


def test_decoded_body_quoted_printable_rfc2045_soft_breaks() -> None:
    # RFC 2045, section 6.7, rule 5: "=" at the end of a line is a soft line break.
    part = parse_entity(
        b"Content-Transfer-Encoding: quoted-printable\n\nNow's the time =\nfor all folk=3D\n",
        0,
        (),
    )
    assert part.decoded_body(1000)[0] == b"Now's the time for all folk=\n"


def test_b64decode_lenient_junk_and_truncation() -> None:
    good = base64.b64encode(b"Harbour Lane Veterinary Practice")
    assert b64decode_lenient(good) == (b"Harbour Lane Veterinary Practice", False)
    assert b64decode_lenient(good[:10] + b"!!\r\n" + good[10:])[0].startswith(b"Harbour Lane")
    # One stray character after the last full quartet cannot be decoded: dropped, flagged.
    assert b64decode_lenient(good + b"Q") == (b"Harbour Lane Veterinary Practice", True)
    assert b64decode_lenient(b"@@@@")[0] == b""


def test_decode_bytes_wrong_declared_charsets() -> None:
    # latin-1 bytes declared utf-8, and utf-8 bytes declared latin-1.
    text = "Größe der Hündin: 12 kg, Tierärztin Dr. Okafor"
    assert decode_bytes(text.encode("latin-1"), "utf-8") == (text, True)
    assert decode_bytes(text.encode("utf-8"), "iso-8859-1") == (text, True)
    assert decode_bytes(text.encode("utf-8"), "utf-8") == (text, False)
    assert decode_bytes(b"plain", "no-such-charset") == ("plain", False)


def test_decode_bytes_detects_undeclared_cyrillic() -> None:
    text = "Здравствуйте, запишите нашу собаку на прививку в пятницу утром, пожалуйста."
    decoded, mismatch = decode_bytes(text.encode("cp1251"), "")
    assert mismatch
    assert decoded == text


def test_field_gives_the_first_of_repeated_fields_and_none_when_absent() -> None:
    # RFC 5322 section 3.6.7 allows several trace fields; Received is the usual repeat.
    raw = (
        b"Received: from relay2.example.net by mx.harbourlane.example\r\n"
        b"Subject: Kennel rota\r\n"
        b"Received: from desk.vetsupply.example by relay2.example.net\r\n"
        b"SUBJECT: a second subject\r\n\r\nBody\r\n"
    )
    part = parse_entity(raw, 0, ())
    assert part.field("received") == b"from relay2.example.net by mx.harbourlane.example"
    assert part.field("subject") == b"Kennel rota"
    assert part.field("reply-to") is None
    assert [name for name, _ in part.fields] == ["received", "subject", "received", "subject"]

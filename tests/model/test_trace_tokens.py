"""Relay, authentication-result, Message-ID and mailing-list tokens (model/header_tokens.py)
on header sections written for the Harbour Lane Veterinary Practice scenario.

Received fields follow RFC 5321 section 4.4 in the form the common servers write it
("from <HELO> (<reverse name> [<address>]) by ...", reverse name "unknown" when the address
has none; that form from memory of Postfix's, no other source).  Authentication-Results
follows RFC 8601 section 2.2 (authserv-id, then "method=result" clauses with properties such
as header.d, comments allowed anywhere); the examples are ours, in the style of RFC 8601
Appendix B.  List-Id follows RFC 2919 section 3 ("phrase <list-label.namespace>").  Addresses
are from the documentation ranges of RFC 5737.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.model.header_tokens import (
    auth_tokens,
    relay_tokens,
    sender_tokens,
    structure_tokens,
)
from mailweir.model.mime import Limits, walk
from mailweir.model.tokenize import tokens

OURS = "by mx.harbourlane.example (Postfix) with ESMTPS id 4QhL2x0Z3bz9; Wed, 2 Dec 2026 09:14"
BODY = "\r\nThe vaccine order arrives on Tuesday.\r\n"


def top(*fields: str) -> object:
    raw = ("\r\n".join(fields) + "\r\n" + BODY).encode("utf-8")
    return walk(raw, Limits(256 * 1024, 64, 8), ()).top


@pytest.mark.parametrize(
    "received, expected",
    [
        # A supplier's server, its HELO name matching its reverse name.
        (
            f"from mail.vetsupply.example (mail.vetsupply.example [198.51.100.7]) {OURS}",
            ["rcvd:dom:vetsupply.example", "rcvd:helo-matches"],
        ),
        # No reverse name for the address; nothing to compare the HELO name with.
        (f"from bulk.offers.example (unknown [203.0.113.9]) {OURS}", ["rcvd:no-rdns"]),
        # An address literal as HELO name.
        (f"from [203.0.113.9] (unknown [203.0.113.9]) {OURS}", ["rcvd:no-rdns", "rcvd:helo-ip"]),
        # A home connection that calls itself "laptop".
        (
            f"from laptop (dsl-203-0-113-9.broadband.example [203.0.113.9]) {OURS}",
            ["rcvd:dom:broadband.example", "rcvd:helo-differs"],
        ),
        # A folded field, IPv6 client.
        (
            "from relay.coastal-linen.example (relay.coastal-linen.example\r\n"
            f" [IPv6:2001:db8::25]) {OURS}",
            ["rcvd:dom:coastal-linen.example", "rcvd:helo-matches"],
        ),
        # An IPv6 literal written in lower case.
        (
            f"from mail.vetsupply.example (mail.vetsupply.example [ipv6:2001:db8::7]) {OURS}",
            ["rcvd:dom:vetsupply.example", "rcvd:helo-matches"],
        ),
        # Local submission: no "from" clause names a relay.
        ("by mx.harbourlane.example (Postfix, from userid 1000) id 4QhL2x; Wed, 2 Dec 2026", []),
    ],
)
def test_relay_tokens_read_the_newest_hop(received: str, expected: list[str]) -> None:
    assert relay_tokens(top(f"Received: {received}", "Subject: Order")) == expected


def test_relay_tokens_read_two_hops_and_no_further() -> None:
    section = top(
        f"Received: from mail.vetsupply.example (mail.vetsupply.example [198.51.100.7]) {OURS}",
        "Received: from app.vetsupply.example (app.vetsupply.example [198.51.100.20]) by "
        "mail.vetsupply.example; Wed, 2 Dec 2026 09:13:58 +0000",
        "Received: from desk7.office.example (desk7.office.example [192.0.2.70]) by "
        "app.vetsupply.example; Wed, 2 Dec 2026 09:13:50 +0000",
    )
    assert relay_tokens(section) == [
        "rcvd:dom:vetsupply.example",
        "rcvd:helo-matches",
        "rcvd:dom:vetsupply.example",
    ]  # the third hop (office.example) is not read


def test_auth_tokens_read_each_method_and_the_dkim_signer() -> None:
    section = top(
        "Authentication-Results: mx.harbourlane.example; spf=pass smtp.mailfrom=vetsupply.example;"
        "\r\n dkim=pass (2048-bit key; unprotected) header.d=mail.vetsupply.example header.s=s1;"
        "\r\n dmarc=pass (p=none dis=none) header.from=vetsupply.example",
    )
    assert auth_tokens(section) == [
        "auth:spf:pass",
        "auth:dkim:pass",
        "auth:dkim-pass:vetsupply.example",
        "auth:dmarc:pass",
    ]


def test_auth_tokens_undo_nested_comments_and_give_up_on_junk() -> None:
    nested = top(
        "Authentication-Results: mx.harbourlane.example; dkim=pass (key (2048 (rsa)); ok)"
        " header.d=vetsupply.example"
    )
    assert auth_tokens(nested) == ["auth:dkim:pass", "auth:dkim-pass:vetsupply.example"]
    # Nesting deeper than anyone writes is junk: read nothing from it, in bounded passes.
    deep = "(" * 20 + "x" + ")" * 20
    junk = top(
        f"Authentication-Results: mx.harbourlane.example; {deep} dkim=pass header.d=x.example"
    )
    assert auth_tokens(junk) == ["auth:no-results"]


def test_auth_tokens_read_only_the_newest_field() -> None:
    """An older field could come from anyone, the sender included (RFC 8601 section 5)."""
    section = top(
        "Authentication-Results: mx.harbourlane.example; spf=softfail smtp.mailfrom=bank.example;"
        " dkim=none; dmarc=fail header.from=bank.example",
        "Authentication-Results: mx.harbourlane.example; dkim=pass header.d=bank.example",
    )
    assert auth_tokens(section) == ["auth:spf:softfail", "auth:dkim:none", "auth:dmarc:fail"]


@pytest.mark.parametrize(
    "fields, expected",
    [
        ((), ["auth:none"]),
        (("Authentication-Results: mx.harbourlane.example; none",), ["auth:no-results"]),
        (("Authentication-Results: mx.harbourlane.example 1; dkim/1=fail",), ["auth:dkim:fail"]),
    ],
)
def test_auth_tokens_without_results(fields: tuple[str, ...], expected: list[str]) -> None:
    assert auth_tokens(top(*fields, "Subject: Order")) == expected


@pytest.mark.parametrize(
    "fields, expected",
    [
        (
            (
                "From: Orders <orders@vetsupply.example>",
                "Message-ID: <9c1e.77@mail.vetsupply.example>",
            ),
            ["mid:from-domain"],
        ),
        (
            (
                "From: Orders <orders@vetsupply.example>",
                "Message-ID: <abc123@sender-7.bulk.example>",
            ),
            ["mid:dom:bulk.example"],
        ),
        (("From: Orders <orders@vetsupply.example>",), ["mid:none"]),
        (("From: Orders <orders@vetsupply.example>", "Message-ID: <no-domain-here>"), ["mid:none"]),
    ],
)
def test_message_id_tokens(fields: tuple[str, ...], expected: list[str]) -> None:
    assert [t for t in sender_tokens(top(*fields)) if t.startswith("mid:")] == expected


@pytest.mark.parametrize(
    "fields, expected",
    [
        (
            ("List-Id: Practice news from VetSupply <news.vetsupply.example>", "Precedence: bulk"),
            ["list:dom:vetsupply.example", "hdr:precedence:bulk"],
        ),
        (("List-Id: <weekly.offers.bulk.example>",), ["list:dom:bulk.example"]),
        (("List-Id: no angle brackets here", "Precedence: first-class"), []),
        ((), []),
    ],
)
def test_list_tokens(fields: tuple[str, ...], expected: list[str]) -> None:
    found = structure_tokens(top(*fields, "Subject: News"))
    assert [t for t in found if t.startswith(("list:", "hdr:precedence:"))] == expected


def test_trace_tokens_reach_the_message_tokens() -> None:
    raw = (
        f"Received: from mail.vetsupply.example (mail.vetsupply.example [198.51.100.7]) {OURS}\r\n"
        "Authentication-Results: mx.harbourlane.example; dkim=pass header.d=vetsupply.example\r\n"
        "From: Orders <orders@vetsupply.example>\r\n"
        "Message-ID: <9c1e.77@mail.vetsupply.example>\r\n"
        "Subject: Vaccine order\r\n" + BODY
    ).encode()
    found = set(tokens(raw))
    assert {
        "rcvd:dom:vetsupply.example",
        "rcvd:helo-matches",
        "auth:dkim:pass",
        "auth:dkim-pass:vetsupply.example",
        "mid:from-domain",
    } <= found


_FIELD_TEXT = st.text(
    st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n"), max_size=400
)


@given(received=_FIELD_TEXT, results=_FIELD_TEXT, message_id=_FIELD_TEXT)
@settings(max_examples=300, deadline=None)
def test_trace_tokens_never_fail_on_any_field_text(
    received: str, results: str, message_id: str
) -> None:
    """Whatever the fields hold, these families add tokens or nothing; a failure inside the
    tokenizer would show as "mime:failed"."""
    raw = (
        f"Received: {received}\r\nReceived: {received}\r\n"
        f"Authentication-Results: {results}\r\nMessage-ID: {message_id}\r\n"
        "From: Orders <orders@vetsupply.example>\r\nSubject: Order\r\n" + BODY
    ).encode("utf-8")
    found = tokens(raw)
    assert "mime:failed" not in found
    assert sum(t.startswith("rcvd:dom:") for t in found) <= 2
    assert "order" in found  # the body is still read

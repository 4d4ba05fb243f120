"""The quick path reading (daemon/smtp_paths.py) against aiosmtpd's own ``SMTP._getaddr``.

aiosmtpd 1.4's reading (the email package's RFC 5322 header parser) is the oracle: wherever
the quick reading answers, it must give the same address and rest of the line.
"""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from aiosmtpd.smtp import SMTP
from hypothesis import example, given, settings
from hypothesis import strategies as st

from mailweir.daemon.smtp_paths import plain_path


def _aiosmtpd(arg: str) -> tuple[str | None, str | None]:
    return SMTP._getaddr(SimpleNamespace(local_part_limit=0), arg)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    "arg",
    [
        "<maren.okafor@harbourlane.example>",
        "<maren.okafor@harbourlane.example> SIZE=4096 BODY=8BITMIME",
        "<priya.raman@harbourlane.example>\tSIZE=1",
        "<orders@vetsupply.example>SIZE=1",
        "<orders@vetsupply.example>   ",
        "<o'brien+invoices@vetsupply.example> X (y)",
        "<A.B@MAIL.EXAMPLE>",
    ],
)
def test_plain_path_common_forms_match_aiosmtpd(arg: str) -> None:
    assert plain_path(arg) == _aiosmtpd(arg)


@pytest.mark.parametrize(
    "arg",
    [
        "<>",
        "<=?utf-8?q?maren?=@harbourlane.example>",  # an encoded word: the parser decodes it
        '<"maren okafor"@harbourlane.example>',
        "<maren@[192.0.2.10]>",
        "<maren@harbourlane.example> (comment) SIZE=1",
        "<maren@harbourlane.example>(comment)",
        "<maren@harbourlane.>",
        "<.maren@harbourlane.example>",
        "<maren..okafor@harbourlane.example>",
        "<@relay.example:maren@harbourlane.example>",
        "maren@harbourlane.example",
        " <maren@harbourlane.example>",
        "<tobias.lindqvist@härbourlane.example>",
    ],
)
def test_plain_path_other_forms_left_to_aiosmtpd(arg: str) -> None:
    assert plain_path(arg) is None


_PIECES = st.sampled_from([*"ab.@<>=?( )\t\"[]:,;-+'", "=?", "maren", "example"])
_TEXT = st.lists(_PIECES, max_size=8).map("".join)
# Mostly near-plain paths, so the quick reading answers often: <text@text>text.
_PATHS = st.tuples(_TEXT, _TEXT, _TEXT).map(lambda t: f"<{t[0]}@{t[1]}>{t[2]}")


@settings(max_examples=3000, deadline=None)
@given(st.one_of(_PATHS, st.lists(_PIECES, max_size=14).map("".join)))
@example("<a@b> =?x")
@example("<a=?b@c>")
def test_plain_path_agrees_with_aiosmtpd_wherever_it_answers(arg: str) -> None:
    quick = plain_path(arg)
    if quick is not None:
        assert quick == _aiosmtpd(arg)

"""Property tests: the tokenizer never raises, stays bounded and is deterministic.

Structured inputs are built with the standard library's email package (an independent MIME
writer) from random trees: boundaries, nesting, transfer encodings and charsets.
"""

from __future__ import annotations

import re
from email.message import EmailMessage, Message
from email.mime.multipart import MIMEMultipart
from email.mime.text import MIMEText

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from mailweir.model.hashing import hash_tokens
from mailweir.model.normalize import (
    _HINT_CODE,
    _SPACED,
    _SPACED_HINT,
    _SPACED_HINT_CODED,
    _UNIT_ASCII,
    spaced_runs,
    spaced_words,
)
from mailweir.model.tokenize import TokenizerOptions, tokenize, tokens

SMALL = TokenizerOptions(max_tokens=50, max_parts=6, max_depth=3, max_part_bytes=2000)
BIGRAMS = TokenizerOptions(bigrams=True, bigram_window=4, max_tokens=300)
CHARSETS = ["utf-8", "iso-8859-1", "windows-1252", "koi8-r", "shift_jis", "utf-16", "bogus"]
ENCODINGS = ["7bit", "8bit", "quoted-printable", "base64", "x-unknown"]


def _check(raw: bytes, options: TokenizerOptions) -> None:
    found = tokens(raw, options)
    assert isinstance(found, list)
    assert len(found) <= options.max_tokens
    assert len(set(found)) == len(found)
    assert all(isinstance(token, str) and token for token in found)
    assert found == tokens(raw, options)  # deterministic
    assert np.array_equal(tokenize(raw, options), hash_tokens(found))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=3000))
def test_tokens_arbitrary_bytes(raw: bytes) -> None:
    for options in (SMALL, BIGRAMS):
        _check(raw, options)


_FRAGMENTS = st.sampled_from(
    [
        b"Content-Type: multipart/mixed; boundary=",
        b"Content-Type: text/html; charset=",
        b"Content-Transfer-Encoding: base64\r\n",
        b"Content-Transfer-Encoding: quoted-printable\r\n",
        b"Subject: =?utf-8?B?",
        b"=?iso-8859-1?q?",
        b"?=",
        b"--",
        b"\r\n\r\n",
        b"\n",
        b"<a href=http://",
        b"<!--",
        b"<script>",
        b"</a>",
        b"&amp;",
        b"v1agra f r e e $100 ",
        b"\xe2\x80\x8b",
        b"\xff\xfe",
        b"\x00",
        b"=\r\n",
        b'"',
        b";",
    ]
)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.one_of(_FRAGMENTS, st.binary(max_size=20)), max_size=60))
def test_tokens_mime_like_fragments(pieces: list[bytes]) -> None:
    _check(b"".join(pieces), SMALL)


_WORDS = st.text(
    alphabet=st.characters(blacklist_categories=["Cs"]), min_size=0, max_size=80
) | st.sampled_from(["Kennel booking for Bello", "Größe €100", "fr33 v1agra", "日本語", ""])


@st.composite
def mime_trees(draw: st.DrawFn, depth: int = 0) -> Message:
    if depth < 3 and draw(st.booleans()):
        subtype = draw(st.sampled_from(["mixed", "alternative", "related"]))
        boundary = draw(st.text(alphabet="abcXYZ0123'()+_,-./:=? ", min_size=1, max_size=30))
        container = MIMEMultipart(subtype, boundary=boundary.strip() or "b")
        for _ in range(draw(st.integers(0, 3))):
            container.attach(draw(mime_trees(depth + 1)))
        return container
    text = draw(_WORDS)
    charset = draw(st.sampled_from(CHARSETS))
    subtype = draw(st.sampled_from(["plain", "html"]))
    try:
        part: Message = MIMEText(text, subtype, charset)
    except (LookupError, UnicodeError):
        part = MIMEText(text, subtype, "utf-8")
        part.set_param("charset", charset)  # declared charset that does not fit the bytes
    encoding = draw(st.sampled_from(ENCODINGS))
    if encoding in ("x-unknown", "8bit", "7bit"):
        del part["Content-Transfer-Encoding"]
        part["Content-Transfer-Encoding"] = encoding
    if draw(st.booleans()):
        part.add_header("Content-Disposition", "attachment", filename=draw(_WORDS) or "a.pdf")
    return part


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mime_trees(), _WORDS, st.booleans())
def test_tokens_structured_random_mime(tree: Message, subject: str, lf_only: bool) -> None:
    tree["Subject"] = subject.replace("\n", " ").replace("\r", " ")
    tree["From"] = '"Priya Raman" <priya@harbourlane.example>'
    raw = tree.as_bytes()
    if lf_only:
        raw = raw.replace(b"\r\n", b"\n")
    else:
        raw = raw.replace(b"\r\n", b"\n").replace(b"\n", b"\r\n")
    for options in (SMALL, BIGRAMS, TokenizerOptions()):
        _check(raw, options)


@settings(max_examples=60, deadline=None)
@given(st.text(alphabet="abcdefgh ", min_size=1, max_size=200))
def test_tokens_plain_text_words_found(text: str) -> None:
    # Every run of 3-20 letters in a plain message comes out as a token (an oracle from
    # str.split, independent of the tokenizer's regular expressions).
    message = EmailMessage()
    message["Subject"] = "x"
    message.set_content(text)
    found = set(tokens(message.as_bytes()))
    assert {word for word in text.split() if 3 <= len(word) <= 20} <= found


@settings(max_examples=500, deadline=None)
@given(st.text(alphabet="fre1@$ .-_*+~·•\tab'x,", max_size=80))
def test_spaced_run_hint_never_misses_a_run(text: str) -> None:
    # spaced_words skips its full search when the cheap hint finds nothing; that is only
    # safe if every run the full pattern finds also satisfies the hint.
    if _SPACED.search(text):
        assert _SPACED_HINT.search(text)
    else:
        assert spaced_words(text) == []


SPACED_PIECES = ["f", "r", "e", "R", "1", "3", "|", "ab", " ", "  ", ".", "-", "x y", "x_y", "\t"]


@settings(max_examples=3000, deadline=None)
@given(
    st.text(alphabet="fre1@$ .-_*+~·•\tab'x,", max_size=120)
    | st.text(alphabet="fre1Z9@$!|_ .-*+~\tab'x,\"(", max_size=120)  # ASCII: ASCII patterns
    | st.lists(st.sampled_from(SPACED_PIECES)).map("".join)
)
def test_spaced_runs_finds_what_finditer_finds(text: str) -> None:
    # Oracle: the plain left-to-right scan spaced_runs replaces (of the Unicode pattern, also
    # for ASCII text, which spaced_runs searches with ASCII patterns).
    expected = [(m.start(), m.end()) for m in _SPACED.finditer(text)]
    assert [(m.start(), m.end()) for m in spaced_runs(text)] == expected


# The hint's character-set form for ASCII text, as spaced_runs first searched it.
PLAIN_ASCII_HINT = re.compile(
    r"[ \t.\-_*+~]" + _UNIT_ASCII + r"[ \t.\-_*+~]{1,3}" + _UNIT_ASCII + r"[ \t.\-_*+~]"
)


def _hint_starts(pattern: re.Pattern[str] | re.Pattern[bytes], searched: str | bytes) -> list[int]:
    """Where spaced_runs meets its hints: each searched from one past the last."""
    starts, at = [], 0
    while (hint := pattern.search(searched, at)) is not None:  # type: ignore[call-overload]
        starts.append(hint.start())
        at = hint.start() + 1
    return starts


@settings(max_examples=3000, deadline=None)
@given(
    st.text(st.sampled_from([chr(c) for c in range(128)]), max_size=60)
    | st.lists(st.sampled_from([*SPACED_PIECES, "u", "x", "$", "!", "~", "\n", "'"])).map("".join)
)
def test_coded_hint_finds_what_the_ascii_hint_finds(text: str) -> None:
    # spaced_runs searches ASCII text coded a byte each (separators " ", units "u"); the
    # character-set hint over the text itself is the oracle.
    coded = text.encode("ascii").translate(_HINT_CODE)
    assert _hint_starts(_SPACED_HINT_CODED, coded) == _hint_starts(PLAIN_ASCII_HINT, text)

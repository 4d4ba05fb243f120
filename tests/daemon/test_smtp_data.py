"""Reading DATA to the lone dot, against a line-at-a-time reference (RFC 5321 4.1.1.4, 4.5.2).

The reference is the plain reading of the RFC, as aiosmtpd does it: split the stream at CRLF,
stop at the line ".", drop one leading dot from every other line.  The stream arrives in
random pieces; whatever follows the terminator (a pipelined command) must stay unread.
"""

from __future__ import annotations

import asyncio

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from mailweir.daemon.smtp_data import Data, read_data, unstuff

FOLLOWING = b"MAIL FROM:<greta.holm@mail.example>\r\n"


def by_lines(stream: bytes, limit: int | None) -> tuple[bytes | None, int, bytes]:
    """(content or None when over limit, octets before the terminating line, what follows)."""
    at, octets, lines = 0, 0, []
    while True:
        end = stream.index(b"\r\n", at) + 2
        line, at = stream[at:end], end
        if line == b".\r\n":
            break
        octets += len(line)
        lines.append(line[1:] if line.startswith(b".") else line)
    content = None if limit and octets > limit else b"".join(lines)
    return content, octets, stream[at:]


async def read_in_pieces(
    stream: bytes, cuts: list[int], limit: int | None, reader_limit: int
) -> tuple[Data, bytes]:
    reader = asyncio.StreamReader(limit=reader_limit)

    async def feed() -> None:
        start = 0
        for cut in sorted({*cuts, len(stream)}):
            reader.feed_data(stream[start:cut])
            start = cut
            await asyncio.sleep(0)
        reader.feed_eof()

    feeding = asyncio.create_task(feed())
    data = await read_data(reader, limit)
    await feeding
    return data, await reader.read()


PIECES = st.sampled_from([b".", b"..", b"\r\n", b"\r", b"\n", b".\r\n", b"ab", b"Otis ", b"\r\n."])


@settings(max_examples=600, deadline=None)
@given(
    body=st.lists(PIECES, max_size=40).map(b"".join),
    cuts=st.lists(st.integers(0, 300), max_size=8),
    limit=st.sampled_from([None, 0, 1, 4, 16, 64]),
)
def test_read_data_matches_reading_line_by_line(
    body: bytes, cuts: list[int], limit: int | None
) -> None:
    stream = body + b"\r\n.\r\n" + FOLLOWING
    expected = by_lines(stream, limit)
    # The daemon's reader holds the size limit and a little more (smtp_server.FilterSMTP);
    # small reader limits also drive the path for data with no ".\r\n" within them.
    for reader_limit in {(limit or 2**16) + 3, 5, 8}:
        data, rest = asyncio.run(read_in_pieces(stream, cuts, limit, reader_limit))
        if reader_limit < (limit or 2**16) + 3 and expected[0] is not None:
            continue  # a reader that cannot hold the message drops it: only refusals compare
        assert (data.content, data.octets, rest) == expected


def test_read_data_examples() -> None:
    def read(stream: bytes, limit: int | None = None) -> tuple[bytes | None, int, bytes]:
        data, rest = asyncio.run(read_in_pieces(stream, [], limit, 2**16))
        return data.content, data.octets, rest

    assert read(b".\r\n" + FOLLOWING) == (b"", 0, FOLLOWING)  # an empty message
    assert read(b"Luna is well.\r\n.\r\n") == (b"Luna is well.\r\n", 15, b"")
    # A line that is a single dot is sent as ".." (RFC 5321 section 4.5.2).
    assert read(b"..\r\n...x\r\n.\r\n") == (b".\r\n..x\r\n", 10, b"")
    assert read(b"a dot.\r\n.not the end\r\n.\r\nQUIT\r\n") == (
        b"a dot.\r\nnot the end\r\n",
        22,
        b"QUIT\r\n",
    )
    assert read(b"x" * 20 + b"\r\n.\r\n", limit=21) == (None, 22, b"")
    assert read(b"x" * 20 + b"\r\n.\r\n", limit=22)[0] == b"x" * 20 + b"\r\n"


def test_read_data_lost_connection_raises() -> None:
    with pytest.raises(asyncio.IncompleteReadError):
        asyncio.run(read_in_pieces(b"Otis is due his booster\r\n", [], None, 2**16))


def test_unstuff() -> None:
    assert unstuff(b"..\r\n.a\r\nb.\r\n") == b".\r\na\r\nb.\r\n"
    assert unstuff(b"") == b""

"""Hostile and broken input: the tokenizer and the SMTP path never crash, stay within stated
memory, and every message is still relayed, byte for byte apart from our header fields.

Bounds asserted (generous, so a loaded machine never flakes; wall time is measured and
printed, never asserted, see DEVELOPERS.md):

- tokenizer: no "mime:failed" marker (its way of saying it caught an exception), at most
  ``max_tokens`` tokens, and a tracemalloc peak under 64 MB beyond the input it was given;
- SMTP path: 250 for every message, the next hop's copy equal to what was sent once
  Mailweir-* fields are removed on both sides (forged ones are dropped by the daemon).

bench/fuzz_tokenizer.py runs the tokenizer under atheris for longer, by hand.
"""

from __future__ import annotations

import resource
import time
import tracemalloc
from collections.abc import Iterator

import pytest
from hostile_messages import CRAFTED, MB, fixed_messages
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from reliability_helpers import message_id, without_own_fields
from threaded_daemon import ThreadedDaemon, as_sent, threaded_daemon

from mailweir.model.tokenize import DEFAULT_OPTIONS, tokens

TOKENIZER_MEMORY_BOUND = 64 * MB

FIXED = fixed_messages()


def measure(raw: bytes) -> tuple[list[str], float, int]:
    """Tokens, wall seconds and the tracemalloc peak (bytes) of one tokenizer call."""
    tracemalloc.start()
    try:
        started = time.perf_counter()
        found = tokens(raw)
        seconds = time.perf_counter() - started
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return found, seconds, peak


def check_tokens(found: list[str]) -> None:
    assert "mime:failed" not in found
    assert 0 < len(found) <= DEFAULT_OPTIONS.max_tokens
    assert all(isinstance(t, str) and t for t in found)


@pytest.mark.parametrize("name", [*CRAFTED, *FIXED])
def test_hostile_tokenizer_stays_within_bounds(name: str) -> None:
    raw = CRAFTED[name]() if name in CRAFTED else FIXED[name]
    found, seconds, peak = measure(raw)
    check_tokens(found)
    print(f"\nHOSTILE-TOKENIZER | {name} | {len(raw)} bytes | {seconds:.3f} s | peak {peak} B")
    assert peak < TOKENIZER_MEMORY_BOUND, f"{name}: {peak / MB:.1f} MB"


@pytest.fixture(scope="module")
def daemon(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ThreadedDaemon]:
    with threaded_daemon(tmp_path_factory.mktemp("hostile")) as running:
        yield running


def relayed_copy(daemon: ThreadedDaemon, key: str) -> bytes:
    copies = [d.content for d in daemon.sink.deliveries if message_id(d.content) == key]
    assert len(copies) == 1, f"{key}: {len(copies)} copies at the next hop"
    return copies[0]


@pytest.mark.slow
def test_hostile_crafted_messages_are_all_relayed_intact(daemon: ThreadedDaemon) -> None:
    worst_seconds = 0.0
    for name, raw in {**{n: make() for n, make in CRAFTED.items()}, **FIXED}.items():
        started = time.monotonic()
        code, text = daemon.send(raw)
        seconds = time.monotonic() - started
        worst_seconds = max(worst_seconds, seconds)
        assert code == 250, (name, code, text)
        key = message_id(raw)
        assert key is not None, name
        delivered = relayed_copy(daemon, key)
        assert without_own_fields(delivered) == without_own_fields(as_sent(raw)), name
        assert delivered.startswith(b"Mailweir-Verdict: "), name
        print(f"\nHOSTILE-SMTP | {name} | {len(raw)} bytes | 250 | {seconds:.2f} s")
    peak_rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(
        f"\nHOSTILE-SMTP | worst {worst_seconds:.2f} s | test process peak RSS {peak_rss_mb:.0f} MB"
    )
    assert daemon.service.judge.counts["failed"] == 0


# -- hypothesis ------------------------------------------------------------------------------

_FIELD_NAMES = st.sampled_from(
    [
        b"Subject",
        b"From",
        b"Content-Type",
        b"Content-Transfer-Encoding",
        b"Mailweir-Verdict",
        b"MAILWEIR-ID",
        b"mailweir-score",
        b"Received",
        b"X",
        b"Content-Disposition",
    ]
)
_VALUES = st.one_of(
    st.binary(max_size=200).map(lambda b: b.replace(b"\r", b"").replace(b"\n", b"")),
    st.sampled_from(
        [
            b'multipart/mixed; boundary="b"',
            b"multipart/alternative; boundary=",
            b"base64",
            b"quoted-printable",
            b"text/html; charset=utf-7",
            b"=?utf-8?b?w6k=?= =?x?q?=ZZ?=",
            b"message/rfc822",
            b"attachment; filename*0*=utf-8''%FF%00.exe",
            b"'; DROP TABLE x;--",
        ]
    ),
)
_LINES = st.one_of(
    st.binary(max_size=300).map(lambda b: b.replace(b"\r", b"").replace(b"\n", b"")),
    st.sampled_from([b"--b", b"--b--", b"--", b".", b"..", b"", b"\x00", b"=\xff=", b"<a href=x>"]),
)


@st.composite
def messages(draw: st.DrawFn) -> bytes:
    """Header fields (ours among them), then a body of lines that look like MIME."""
    fields = draw(st.lists(st.tuples(_FIELD_NAMES, _VALUES), max_size=12))
    folded = draw(st.booleans())
    head = b"".join(
        name + b": " + value + (b"\r\n\tmore" if folded else b"") + b"\r\n"
        for name, value in fields
    )
    body = b"\r\n".join(draw(st.lists(_LINES, max_size=40)))
    return head + b"\r\n" + body


@settings(max_examples=300, deadline=None)
@given(raw=st.one_of(st.binary(max_size=8192), messages()))
def test_hostile_tokenizer_fuzz_never_fails(raw: bytes) -> None:
    check_tokens(tokens(raw))


_COUNTER = iter(range(10**9))


@pytest.mark.slow
@settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(raw=messages())
def test_hostile_smtp_fuzz_every_message_relayed(daemon: ThreadedDaemon, raw: bytes) -> None:
    key = f"fuzz-{next(_COUNTER)}@mail.example"
    raw = f"Message-ID: <{key}>\r\n".encode() + raw
    code, text = daemon.send(raw)
    assert code == 250, (code, text)
    delivered = relayed_copy(daemon, key)
    assert without_own_fields(delivered) == without_own_fields(as_sent(raw))

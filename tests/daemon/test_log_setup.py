"""Log lines: JSON or text, RFC 3339 UTC times, the tracking id on lines about a message, and
never the message's text."""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import io
import json
import logging
import re
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from smtp_helpers import LOCAL, NextHop, daemon_settings, send
from test_forwarded import delivered

from mailweir.daemon import log_setup, scenario
from mailweir.daemon.feedback import FeedbackIntake, hashes_of
from mailweir.daemon.feedback_types import FeedbackRequest
from mailweir.daemon.service import Service
from mailweir.daemon.settings import (
    FeedbackSettings,
    HostPort,
    HttpSettings,
    LogSettings,
    ModelSettings,
)
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.store import ModelStore, VerdictRecord

# Words that appear only in the test message's subject and body (ours, invented).
SUBJECT = "Quillfeather dosage for Biscuit"
BODY_WORDS = ("marzipanwolf", "tangerinecomet")
MESSAGE = (
    b"From: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"To: Dr. Maren Okafor <maren.okafor@harbourlane.example>\r\n"
    b"Subject: " + SUBJECT.encode() + b"\r\n"
    b"\r\n"
    b"Biscuit's owner asks about marzipanwolf drops; tangerinecomet is out of stock.\r\n"
)
ID_IN_REPLY = re.compile(rb"mailweir id ([0-9a-v]{16})")


@pytest.fixture
def captured() -> Iterator[tuple[io.StringIO, LogSettings]]:
    """The daemon's logging pointed at a buffer, restored afterwards."""
    names = ("mailweir", *log_setup.LIBRARY_LOGGERS)
    saved = {n: (logging.getLogger(n).handlers[:], logging.getLogger(n).level) for n in names}
    buffer = io.StringIO()
    settings = LogSettings(level="debug", format="json")
    log_setup.configure_logging(settings, buffer)
    yield buffer, settings
    for name, (handlers, level) in saved.items():
        logging.getLogger(name).handlers[:] = handlers
        logging.getLogger(name).setLevel(level)


def test_log_setup_rfc3339_is_utc_with_milliseconds() -> None:
    # RFC 3339 section 5.8 example form "1985-04-12T23:20:50.52Z"; 482196050.52 is that instant.
    assert log_setup.rfc3339(482196050.52) == "1985-04-12T23:20:50.520Z"
    parsed = dt.datetime.fromisoformat(log_setup.rfc3339(0.0).replace("Z", "+00:00"))
    assert parsed == dt.datetime(1970, 1, 1, tzinfo=dt.UTC)


async def test_log_setup_tracking_id_ends_with_the_scoped_hook(
    captured: tuple[io.StringIO, LogSettings],
) -> None:
    buffer, _ = captured
    log = logging.getLogger("mailweir.test")

    @log_setup.message_scoped
    async def hook() -> None:
        log.info("before the id")
        log_setup.tag_message("0v1abc2def3ghi4j")
        await asyncio.to_thread(log.info, "in a worker thread")

    await hook()
    log.info("after the hook")
    lines = [json.loads(line) for line in buffer.getvalue().splitlines()]
    assert [line.get("tracking_id") for line in lines] == [None, "0v1abc2def3ghi4j", None]
    assert {line["logger"] for line in lines} == {"mailweir.test"}
    assert all(line["time"].endswith("Z") for line in lines)


def test_log_setup_text_format_shows_the_id() -> None:
    buffer = io.StringIO()
    handler = log_setup.make_handler(LogSettings(format="text"), buffer)
    record = logging.LogRecord(
        "mailweir.smtp", logging.WARNING, "", 0, "next hop: %s", ("x",), None
    )
    record.tracking_id = "0v1abc2def3ghi4j"
    handler.handle(record)
    assert re.fullmatch(
        r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z WARNING mailweir\.smtp \[0v1abc2def3ghi4j\] "
        r"next hop: x\n",
        buffer.getvalue(),
    )


@pytest.mark.slow
async def test_log_setup_transaction_lines_carry_id_and_never_text(
    tmp_path: Path, next_hop: NextHop, captured: tuple[io.StringIO, LogSettings]
) -> None:
    buffer, log_settings = captured
    base = daemon_settings(next_hop.address, mode="observe")
    settings = dataclasses.replace(
        base,
        state_dir=tmp_path,
        model=ModelSettings(scoring_workers=1),
        http=HttpSettings(listen=HostPort(LOCAL, 0)),
        log=log_settings,
    )
    service = Service(settings)
    await service.startup()
    try:
        port = service.smtp_address.port
        passed = await send(port, MESSAGE, sender="priya.raman@harbourlane.example")
        assert passed.data is not None and passed.data[0] == 250
        next_hop.behaviour.data_reply = "451 4.3.0 Try again later"
        deferred = await send(port, MESSAGE, sender="priya.raman@harbourlane.example")
        assert deferred.data is not None and deferred.data[0] == 451
    finally:
        await service.shutdown(grace=5)
    first = ID_IN_REPLY.search(passed.data[1])
    assert first is not None
    lines = [json.loads(line) for line in buffer.getvalue().splitlines()]
    tagged = [line for line in lines if "tracking_id" in line]
    ids = {line["tracking_id"] for line in tagged}
    assert first.group(1).decode() in ids and len(ids) == 2  # both messages have lines
    assert any(line["level"] == "warning" and "next hop" in line["message"] for line in tagged)
    # One summary line per message, whatever happened to it (as a mail server logs each).
    summaries = [
        line for line in tagged if " from=<priya.raman@harbourlane.example> " in line["message"]
    ]
    assert [line["message"].rsplit("reply=", 1)[1] for line in summaries] == ["250", "451"]
    assert {line["tracking_id"] for line in summaries} == ids
    for line in lines:
        assert {"time", "level", "logger", "message"} <= set(line)
        named = [i for i in ids if i in line["message"]]
        assert named == [] or named == [line.get("tracking_id")], line  # id in text -> field
    text = buffer.getvalue()
    for secret in (SUBJECT, "Quillfeather", *BODY_WORDS):
        assert secret not in text


async def test_log_setup_feedback_lines_carry_the_id_they_name(
    tmp_path: Path, captured: tuple[io.StringIO, LogSettings]
) -> None:
    # A junk mail carrying the id of a wanted message (the forged-id case of feedback.py): the
    # intake's warning about it must carry that id, and nothing after the correction may.
    buffer, _ = captured
    tracking_id = "0ljq3k2c5g1a9b7e"
    store = ModelStore.open(str(tmp_path / "model.sqlite3"))
    try:
        wanted = hashes_of(scenario.overdue_reminder().raw, DEFAULT_OPTIONS)
        record = VerdictRecord(tracking_id, time.time() - 60, 1, 900, 0.01, "ham", "pass", wanted)
        store.record_verdicts([record])
        intake = FeedbackIntake(store, FeedbackSettings(), DEFAULT_OPTIONS)
        junk = delivered(scenario.generate(1, "spam", 5)[0].raw, tracking_id, band="ham")
        await intake(FeedbackRequest("spam", "mail", raw=junk))
        logging.getLogger("mailweir.test").info("after the correction")
    finally:
        store.close()
    lines = [json.loads(line) for line in buffer.getvalue().splitlines()]
    warned = [line for line in lines if "shares only" in line["message"]]
    assert warned and all(line.get("tracking_id") == tracking_id for line in warned)
    assert "tracking_id" not in lines[-1]

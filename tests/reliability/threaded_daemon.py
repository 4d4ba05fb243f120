"""A whole daemon and its next-hop sink on an event loop of their own, in a thread.

For synchronous tests that send many small transactions (hypothesis examples): one daemon
serves them all, and the test talks to it over 127.0.0.1 with smtplib.
"""

from __future__ import annotations

import asyncio
import re
import smtplib
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from reliability_helpers import (
    LOCAL,
    RECIPIENT,
    SENDER,
    FaultyNextHop,
    service_settings,
    trained_store,
)

START_SECONDS = 60.0
_EOL = re.compile(rb"\r\n|\r|\n")


class ThreadedDaemon:
    def __init__(self, tmp_path: Path) -> None:
        self.tmp_path = tmp_path
        self.loop = asyncio.new_event_loop()
        self.sink = FaultyNextHop()
        self.port = 0
        self.service: Any = None
        self._stop: asyncio.Event | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="reliability-daemon", daemon=True)

    def start(self) -> None:
        trained_store(self.tmp_path / "model.sqlite3")
        self._thread.start()
        if not self._ready.wait(START_SECONDS):
            raise AssertionError(f"daemon did not start within {START_SECONDS}s")
        if self._error is not None:
            raise self._error

    def stop(self) -> None:
        if self._stop is not None:
            self.loop.call_soon_threadsafe(self._stop.set)
        self._thread.join(START_SECONDS)

    def _run(self) -> None:
        asyncio.set_event_loop(self.loop)
        try:
            self.loop.run_until_complete(self._main())
        finally:
            self.loop.close()

    async def _main(self) -> None:
        from mailweir.daemon.service import Service

        self._stop = asyncio.Event()
        try:
            await self.sink.start()
            settings = service_settings(self.tmp_path, self.sink.address)
            self.service = Service(settings)
            await self.service.startup()
            self.port = self.service.smtp_address.port
        except BaseException as exc:
            self._error = exc
            self._ready.set()
            await self.sink.stop()
            return
        self._ready.set()
        try:
            await self._stop.wait()
        finally:
            await self.service.shutdown(grace=5)
            await self.sink.stop()

    def send(self, raw: bytes, timeout: float = 60.0) -> tuple[int, bytes]:
        """One transaction with smtplib; the reply to the end of DATA."""
        with smtplib.SMTP(LOCAL, self.port, local_hostname="mx.mail.example", timeout=timeout) as c:
            c.ehlo()
            c.mail(SENDER)
            code, text = c.rcpt(RECIPIENT)
            if code != 250:
                return code, text
            try:
                return c.data(raw)
            except smtplib.SMTPDataError as exc:
                return exc.smtp_code, exc.smtp_error


def as_sent(raw: bytes) -> bytes:
    """What an SMTP client puts on the wire for ``raw`` once the server removed the dot
    stuffing: every line ending CRLF (RFC 5321 section 2.3.8), a final CRLF added."""
    data = _EOL.sub(b"\r\n", raw)
    return data if data.endswith(b"\r\n") else data + b"\r\n"


@contextmanager
def threaded_daemon(tmp_path: Path) -> Iterator[ThreadedDaemon]:
    daemon = ThreadedDaemon(tmp_path)
    daemon.start()
    try:
        yield daemon
    finally:
        daemon.stop()

"""The daemon's log lines: one JSON object per line, or plain text, on standard error.

Standard error is where systemd's journal (and any container runtime) collects a service's
output, so the daemon never opens log files of its own.

Every line carries an RFC 3339 UTC timestamp, the level, the logger name and the event.  A line
written while a message is being handled also carries that message's tracking id: the SMTP and
feedback code call :func:`tag_message` once, when the id is known, inside a hook wrapped with
:func:`message_scoped`, and a filter on the handler copies the id from a context variable into
each record.  No log call has to pass it, and worker threads started with ``asyncio.to_thread``
inherit it.  Lines never carry message text: envelope addresses, sizes, ids and reply codes only.
"""

from __future__ import annotations

import contextvars
import datetime as dt
import functools
import json
import logging
import sys
from collections.abc import Awaitable, Callable
from typing import IO, Any, ParamSpec, TypeVar

from mailweir.daemon.settings import LogSettings

P = ParamSpec("P")
R = TypeVar("R")

_tracking_id: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "mailweir_tracking_id", default=None
)

# Libraries whose lines go through our handler too, so a log collector reading JSON never meets
# a line in another shape.  They stay at WARNING whatever log.level says: aiosmtpd logs the
# protocol dialogue, message lines included, at DEBUG.
LIBRARY_LOGGERS = ("mail.log", "asyncio", "aiohttp")


def tag_message(tracking_id: str | None) -> None:
    """From now on, until the enclosing :func:`message_scoped` hook returns, log lines carry
    this tracking id."""
    _tracking_id.set(tracking_id)


def current_tracking_id() -> str | None:
    return _tracking_id.get()


def message_scoped(hook: Callable[P, Awaitable[R]]) -> Callable[P, Awaitable[R]]:
    """Wrap an async hook so a tracking id tagged inside it ends with it.

    aiosmtpd runs all of one connection's commands in one task; without the reset, the id of a
    connection's first message would stick to the lines of its next transaction.
    """

    @functools.wraps(hook)
    async def scoped(*args: P.args, **kwargs: P.kwargs) -> R:
        token = _tracking_id.set(None)
        try:
            return await hook(*args, **kwargs)
        finally:
            _tracking_id.reset(token)

    return scoped


class TrackingIdFilter(logging.Filter):
    """Adds ``record.tracking_id`` (None outside a message) to every record it sees."""

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "tracking_id", None) is None:
            record.tracking_id = _tracking_id.get()
        return True


def rfc3339(created: float) -> str:
    """``2026-12-02T03:17:09.123Z``: RFC 3339 section 5.6, UTC, milliseconds."""
    moment = dt.datetime.fromtimestamp(created, dt.UTC)
    return moment.strftime("%Y-%m-%dT%H:%M:%S.") + f"{moment.microsecond // 1000:03d}Z"


class JsonLines(logging.Formatter):
    """One JSON object per line: time, level, logger, message, tracking_id, traceback."""

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": rfc3339(record.created),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        tracking_id = getattr(record, "tracking_id", None)
        if tracking_id is not None:
            entry["tracking_id"] = tracking_id
        if record.exc_info:
            entry["traceback"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False)


class PlainText(logging.Formatter):
    """``<time> <LEVEL> <logger> [<tracking id>] <message>``, traceback on the lines below."""

    def format(self, record: logging.LogRecord) -> str:
        tracking_id = getattr(record, "tracking_id", None)
        tag = f" [{tracking_id}]" if tracking_id else ""
        line = f"{rfc3339(record.created)} {record.levelname} {record.name}{tag} "
        line += record.getMessage()
        if record.exc_info:
            line += "\n" + self.formatException(record.exc_info)
        return line


def make_handler(settings: LogSettings, stream: IO[str] | None = None) -> logging.Handler:
    handler = logging.StreamHandler(sys.stderr if stream is None else stream)
    handler.setFormatter(JsonLines() if settings.format == "json" else PlainText())
    handler.addFilter(TrackingIdFilter())
    return handler


def configure_logging(settings: LogSettings, stream: IO[str] | None = None) -> logging.Handler:
    """Send mailweir's lines (and the libraries' warnings) to ``stream``, standard error by
    default, in the configured format; returns the handler (tests remove it again)."""
    handler = make_handler(settings, stream)
    ours = logging.getLogger("mailweir")
    ours.handlers[:] = [handler]
    ours.setLevel(settings.level.upper())
    for name in LIBRARY_LOGGERS:
        library = logging.getLogger(name)
        library.handlers[:] = [handler]
        library.setLevel(logging.WARNING)
    return handler

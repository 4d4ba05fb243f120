"""The verdict journal: every verdict on disk before the upstream hears 250.

The verdict log writes the database in batches behind the message path, so a daemon killed
between two batches (SIGKILL, the OOM killer) used to lose the rows still queued; the mail was
never at risk, only its record.  Now :meth:`VerdictLog.add` first appends the record as one
line (see :func:`encode`) to a segment file in ``<state_dir>/verdict-journal/``.  It is a
plain ``write(2)``: once it returns, the line is the kernel's, and it outlives the process.  It
does not outlive a power cut (no fsync: that would put a disk flush before every 250, for a log
line).

A segment is deleted as soon as every record in it has left the queue (written, or dropped
past the backlog limit); a new one starts past ``SEGMENT_BYTES``.  At start, the segments of
the previous run are replayed: each record whose tracking id the database does not have yet is
written (the tracking id is the table's key, so a replay never duplicates a row), then the
segments are deleted.  A lock file keeps two daemons from sharing one journal.
"""

from __future__ import annotations

import base64
import contextlib
import dataclasses
import fcntl
import json
import logging
import os
import re
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from mailweir.store.verdicts import VerdictRecord, pack_hashes, unpack_hashes

log = logging.getLogger("mailweir.verdict_log")

FOLDER = "verdict-journal"
SEGMENT_BYTES = 4 * 1024 * 1024  # about a thousand verdicts of a few hundred tokens each
REPLAY_BATCH = 500
_SEGMENT = re.compile(r"^segment-(\d{1,18})\.journal$")
_FIELDS = tuple(f.name for f in dataclasses.fields(VerdictRecord))


def encode(record: VerdictRecord) -> bytes:
    """One line: the other fields as a JSON object, a tab, then the token hashes as base64
    of little-endian int64 ("-" for none).  The hashes stay out of the JSON: escaping a few
    KB of text would triple the time this takes before the 250."""
    entry = {name: getattr(record, name) for name in _FIELDS if name != "token_hashes"}
    packed = pack_hashes(record.token_hashes)
    hashes = b"-" if packed is None else base64.b64encode(packed)
    return json.dumps(entry, separators=(",", ":")).encode("utf-8") + b"\t" + hashes + b"\n"


def decode(line: bytes) -> VerdictRecord | None:
    """The record of one line, or None for a line that is not one (torn by a power cut)."""
    text, tab, hashes = line.rstrip(b"\n").rpartition(b"\t")
    try:
        entry = json.loads(text)
        blob = None if hashes == b"-" else base64.b64decode(hashes, validate=True)
        if not tab or (blob is not None and len(blob) % 8):
            return None
        entry["token_hashes"] = unpack_hashes(blob)
        return VerdictRecord(**{k: v for k, v in entry.items() if k in _FIELDS})
    except (ValueError, TypeError, AttributeError):
        return None


class VerdictJournal:
    """Numbered append-only segments in one folder; :meth:`open` before use."""

    def __init__(self, folder: Path, segment_bytes: int = SEGMENT_BYTES) -> None:
        self.folder = folder
        self._segment_bytes = segment_bytes
        self._lock: int | None = None
        self._fd: int | None = None
        self.current = 0  # the segment lines go to
        self._size = 0  # bytes in it
        self._full: list[int] = []  # this run's earlier segments, not yet deleted
        self.leftovers: list[Path] = []  # the previous run's segments, to replay

    def open(self) -> None:
        """Create the folder, take its lock and list what an earlier run left; OSError if not."""
        self.folder.mkdir(parents=True, exist_ok=True)
        lock = os.open(self.folder / "lock", os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)  # released by the kernel on exit
        except OSError:
            os.close(lock)
            raise
        self._lock = lock
        numbers = sorted(
            int(match.group(1))
            for match in (_SEGMENT.match(p.name) for p in self.folder.iterdir())
            if match
        )
        self.leftovers = [self._path(n) for n in numbers]
        self.current = numbers[-1] + 1 if numbers else 0

    def append(self, line: bytes) -> int:
        """Write one line; return the number of its segment.  Raises OSError (disk full)."""
        segment = self.current
        try:
            if self._fd is None:
                flags = os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC
                self._fd = os.open(self._path(segment), flags, 0o600)
            view = memoryview(line)
            while view:
                view = view[os.write(self._fd, view) :]
        except OSError:
            self._next_segment()  # a torn line stays the last of its segment
            raise
        self._size += len(line)
        if self._size >= self._segment_bytes:
            self._next_segment()
        return segment

    def release(self, oldest_needed: int | None) -> None:
        """Delete this run's segments before ``oldest_needed``, the oldest segment a queued
        record is in (None: nothing is queued, so every segment goes, the current one too)."""
        if oldest_needed is None and self._size:
            self._next_segment()
        keep = []
        for number in self._full:
            if oldest_needed is None or number < oldest_needed:
                with contextlib.suppress(FileNotFoundError):
                    self._path(number).unlink()
            else:
                keep.append(number)
        self._full = keep

    def drop_leftovers(self) -> None:
        for path in self.leftovers:
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
        self.leftovers = []

    def close(self) -> None:
        for fd in (self._fd, self._lock):
            if fd is not None:
                os.close(fd)
        self._fd = self._lock = None

    def _next_segment(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._full.append(self.current)
        self.current += 1
        self._size = 0

    def _path(self, number: int) -> Path:
        return self.folder / f"segment-{number:012d}.journal"


def read_segments(paths: Iterable[Path]) -> tuple[list[VerdictRecord], int]:
    """The records in ``paths`` (one per tracking id) and how many lines were unreadable."""
    records: dict[str, VerdictRecord] = {}
    unreadable = 0
    for path in paths:
        for line in path.read_bytes().splitlines():
            record = decode(line) if line.strip() else None
            if record is None:
                unreadable += bool(line.strip())
                continue
            records[record.tracking_id] = record
    return list(records.values()), unreadable


def replay(store: Any, paths: Iterable[Path]) -> tuple[int, int, int]:
    """Write the records of ``paths`` the database lacks (blocking: run it in a thread).

    Returns (records read, rows written, unreadable lines)."""
    records, unreadable = read_segments(paths)
    missing = [r for r in records if store.find_verdict(r.tracking_id) is None]
    for start in range(0, len(missing), REPLAY_BATCH):
        store.record_verdicts(missing[start : start + REPLAY_BATCH])
    return len(records), len(missing), unreadable

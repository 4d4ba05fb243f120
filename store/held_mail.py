"""Held mail: the quarantine's copies of rerouted messages, one pair of files per message.

Layout under the quarantine folder (``<state_dir>/quarantine``)::

    <tracking id>.eml        the message exactly as it first arrived (RFC 5322 bytes)
    <tracking id>.json       its envelope and history (sender, original recipients, score,
                             when held, when and how released)
    <tracking id>.releasing  present only while a release is under way (its claim)
    tally.json               running totals (releases by way, expiries, digests) for metrics

Every file is written to a temporary name, flushed to disk and renamed into place, so a
reader sees a whole file or none.  The ``.json`` file is written last: a message counts as
held only once both are complete.  The claim file is created with ``O_EXCL``, so two
processes (the daemon and ``mailweir release``) cannot release one message twice.
"""

from __future__ import annotations

import contextlib
import dataclasses
import fcntl
import json
import os
import re
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final

FORMAT: Final = 1  # the sidecar's "format" field; bumped if its meaning ever changes
TRACKING_ID: Final = re.compile(r"[A-Za-z0-9_-]{1,64}")  # as the verdict log stores it
RELEASE_WAYS: Final = ("command", "http", "feedback")


_UNRECORDED = "sent, not recorded: "  # a claim file's line after a release's record failed


def _claim_note(claim: Path) -> str:
    """What a claim file says was sent without a record ("" if nothing, or unreadable)."""
    try:
        lines = claim.read_text("utf-8", errors="replace").splitlines()
    except OSError:
        return ""
    notes = [line[len(_UNRECORDED) :] for line in lines if line.startswith(_UNRECORDED)]
    return f"sent but its release not recorded ({notes[-1][:300]})" if notes else ""


class HeldMailError(Exception):
    """A held-mail operation that cannot go ahead; the message says why and what to do."""


class NotHeld(HeldMailError):
    """No held copy has this tracking id (never held, or expired)."""


class AlreadyReleased(HeldMailError):
    """The held copy was released before; a message is released once."""


class ReleaseUnderway(HeldMailError):
    """Another release of this message holds the claim (or one was cut off mid-way)."""


@dataclass(frozen=True)
class HeldEnvelope:
    """What the quarantine knows of one held message besides its bytes."""

    tracking_id: str
    sender: str  # the envelope sender; "" for the null reverse-path of a bounce
    recipients: tuple[str, ...]  # the original envelope recipients
    held_at: float  # Unix time
    size: int
    score: float | None = None
    band: str = ""
    eight_bit: bool = False  # the upstream declared BODY=8BITMIME (RFC 6152)
    smtputf8: bool = False  # the upstream asked for SMTPUTF8 (RFC 6531)
    released_at: float | None = None
    released_by: str = ""  # command, http or feedback
    delivered_to: tuple[str, ...] = ()
    refused: tuple[str, ...] = ()  # recipients the next hop refused for good at release
    next_hop_answer: str = ""

    @property
    def released(self) -> bool:
        return self.released_at is not None

    def to_json(self) -> dict[str, Any]:
        data = dataclasses.asdict(self)
        data["format"] = FORMAT
        return data

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> HeldEnvelope:
        names = {f.name for f in dataclasses.fields(cls)}
        values = {k: v for k, v in data.items() if k in names}
        for name in ("recipients", "delivered_to", "refused"):
            values[name] = tuple(values.get(name, ()))
        return cls(**values)


@dataclass
class Tally:
    """Running totals kept beside the held mail, shared by the daemon and the commands."""

    released: dict[str, int] = field(default_factory=lambda: dict.fromkeys(RELEASE_WAYS, 0))
    expired: int = 0
    digests: int = 0


@dataclass(frozen=True)
class HeldFigures:
    """The quarantine at one moment, for gauges and for ``mailweir held``."""

    held: int  # not yet released
    released: int  # released, kept until expiry
    oldest_age: float  # seconds since the oldest unreleased message was held; 0 when none
    past_retention: int  # messages (released or not) older than the retention age


def check_id(tracking_id: str) -> str:
    """``tracking_id`` when it has the shape of ours; it names files, so nothing else will do."""
    if not TRACKING_ID.fullmatch(tracking_id):
        raise NotHeld(f"{tracking_id!r} is not a tracking id (1-64 letters, digits, - or _)")
    return tracking_id


def _write_atomically(path: Path, data: bytes, sync_folder: bool = True) -> None:
    """Write ``data`` to ``path`` through a temporary file, fsync and rename (POSIX atomic)."""
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=path.suffix)
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
            out.flush()
            os.fsync(out.fileno())
        os.replace(temporary, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temporary)
        raise
    if sync_folder:
        _sync_folder(path.parent)


def _sync_folder(folder: Path) -> None:
    # The rename is durable only once the folder's entry is on disk too.
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


class HeldMailStore:
    """The quarantine folder; every method is blocking file I/O (run it in a thread)."""

    def __init__(self, folder: Path) -> None:
        self.folder = Path(folder)
        self._parsed: dict[str, tuple[int, HeldEnvelope]] = {}  # name -> (mtime_ns, envelope)

    def _path(self, tracking_id: str, suffix: str) -> Path:
        return self.folder / f"{check_id(tracking_id)}{suffix}"

    # -- holding ---------------------------------------------------------------------------

    def hold(self, raw: bytes, envelope: HeldEnvelope) -> None:
        """Keep ``raw`` and its envelope; raises OSError when either cannot be written."""
        self.folder.mkdir(parents=True, exist_ok=True)
        # One folder sync after the sidecar's rename makes both renames durable.
        _write_atomically(self._path(envelope.tracking_id, ".eml"), raw, sync_folder=False)
        self._write_envelope(envelope)

    def forget(self, tracking_id: str) -> None:
        """Remove a held copy whose message never left (the relay of the reroute failed)."""
        for suffix in (".json", ".eml"):
            with contextlib.suppress(FileNotFoundError):
                self._path(tracking_id, suffix).unlink()

    def _write_envelope(self, envelope: HeldEnvelope) -> None:
        text = json.dumps(envelope.to_json(), indent=1, sort_keys=True) + "\n"
        _write_atomically(self._path(envelope.tracking_id, ".json"), text.encode("utf-8"))

    # -- reading ---------------------------------------------------------------------------

    def envelope(self, tracking_id: str) -> HeldEnvelope:
        try:
            text = self._path(tracking_id, ".json").read_text(encoding="utf-8")
        except FileNotFoundError:
            raise NotHeld(f"no held message has the tracking id {tracking_id}") from None
        return HeldEnvelope.from_json(json.loads(text))

    def raw(self, tracking_id: str) -> bytes:
        try:
            return self._path(tracking_id, ".eml").read_bytes()
        except FileNotFoundError:
            raise NotHeld(f"the held copy of {tracking_id} is missing its message") from None

    def head(self, tracking_id: str, limit: int = 65536) -> bytes:
        """The first ``limit`` bytes of the held message (enough for its header)."""
        try:
            with self._path(tracking_id, ".eml").open("rb") as held:
                return held.read(limit)
        except FileNotFoundError:
            raise NotHeld(f"the held copy of {tracking_id} is missing its message") from None

    def envelopes(self) -> list[HeldEnvelope]:
        """Every held message, oldest first (unreadable sidecars are skipped, not fatal).

        Sidecars are parsed again only when their change time moved, so the scrape-time
        metrics cost a directory scan and a stat per message, not a parse."""
        found: dict[str, tuple[int, HeldEnvelope]] = {}
        try:
            entries = list(os.scandir(self.folder))
        except FileNotFoundError:
            entries = []
        for entry in entries:
            name = entry.name
            if not name.endswith(".json") or name == "tally.json" or name.startswith("."):
                continue
            try:
                stamp = entry.stat().st_mtime_ns
                known = self._parsed.get(name)
                if known is None or known[0] != stamp:
                    text = Path(entry.path).read_text("utf-8")
                    known = (stamp, HeldEnvelope.from_json(json.loads(text)))
            except (OSError, ValueError, TypeError):
                continue  # being replaced right now, or damaged by hand; never fatal here
            found[name] = known
        self._parsed = found
        return sorted((e for _, e in found.values()), key=lambda e: (e.held_at, e.tracking_id))

    def figures(self, retention_days: float, now: float | None = None) -> HeldFigures:
        now = time.time() if now is None else now
        envelopes = self.envelopes()
        waiting = [e for e in envelopes if not e.released]
        horizon = now - retention_days * 86400.0
        return HeldFigures(
            held=len(waiting),
            released=len(envelopes) - len(waiting),
            oldest_age=max(0.0, now - waiting[0].held_at) if waiting else 0.0,
            past_retention=sum(1 for e in envelopes if e.held_at < horizon),
        )

    # -- releasing -------------------------------------------------------------------------

    def claim(self, tracking_id: str) -> HeldEnvelope:
        """Take the claim to release ``tracking_id``; its envelope.

        Raises :class:`NotHeld`, :class:`AlreadyReleased` or :class:`ReleaseUnderway`.  Pair
        with :meth:`unclaim` whatever happens; :meth:`record_release` in between is what
        makes the release count.
        """
        envelope = self.envelope(tracking_id)
        if envelope.released:
            raise AlreadyReleased(_released_text(envelope))
        claim = self._path(tracking_id, ".releasing")
        try:
            descriptor = os.open(claim, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
        except FileExistsError:
            said = _claim_note(claim)
            if said:
                raise ReleaseUnderway(
                    f"{tracking_id} was {said}; if the recipients have it, nothing is left to "
                    f"do but delete {claim}"
                ) from None
            raise ReleaseUnderway(
                f"a release of {tracking_id} is under way; if none is (a release was cut off), "
                f"check whether the recipients got it, then delete {claim}"
            ) from None
        try:
            os.write(descriptor, f"{os.getpid()} {time.time():.0f}\n".encode("ascii"))
        finally:
            os.close(descriptor)
        envelope = self.envelope(tracking_id)  # a release may have ended just before
        if envelope.released:
            self.unclaim(tracking_id)
            raise AlreadyReleased(_released_text(envelope))
        return envelope

    def note_unrecorded(self, tracking_id: str, note: str) -> None:
        """Write into the claim what a release sent but could not record (best effort: the
        disk that refused the record may refuse this too), for whoever asks next."""
        claim = self._path(tracking_id, ".releasing")
        with contextlib.suppress(OSError), claim.open("a", encoding="utf-8") as out:
            out.write(f"{_UNRECORDED}{note}\n")

    def unclaim(self, tracking_id: str) -> None:
        with contextlib.suppress(FileNotFoundError):
            self._path(tracking_id, ".releasing").unlink()

    def record_release(
        self,
        envelope: HeldEnvelope,
        way: str,
        delivered_to: tuple[str, ...],
        refused: tuple[str, ...],
        answer: str,
        now: float | None = None,
    ) -> HeldEnvelope:
        """Mark ``envelope`` released (between :meth:`claim` and :meth:`unclaim`) and count it."""
        done = dataclasses.replace(
            envelope,
            released_at=time.time() if now is None else now,
            released_by=way,
            delivered_to=delivered_to,
            refused=refused,
            next_hop_answer=answer,
        )
        self._write_envelope(done)
        with self._tally() as tally:
            tally.released[way] = tally.released.get(way, 0) + 1
        return done

    # -- expiry and totals -----------------------------------------------------------------

    def expire(self, older_than: float) -> list[HeldEnvelope]:
        """Delete held mail held before Unix time ``older_than``; returns what went."""
        gone = []
        for envelope in self.envelopes():
            if envelope.held_at >= older_than:
                continue
            if self._path(envelope.tracking_id, ".releasing").exists():
                continue  # being released right now; the next expiry takes it
            self.forget(envelope.tracking_id)
            gone.append(envelope)
        if gone:
            with self._tally() as tally:
                tally.expired += len(gone)
        return gone

    def count_digest(self) -> None:
        with self._tally() as tally:
            tally.digests += 1

    def tally(self) -> Tally:
        try:
            data = json.loads((self.folder / "tally.json").read_text("utf-8"))
        except (OSError, ValueError):
            return Tally()
        released = dict.fromkeys(RELEASE_WAYS, 0) | dict(data.get("released", {}))
        return Tally(released, int(data.get("expired", 0)), int(data.get("digests", 0)))

    @contextlib.contextmanager
    def _tally(self) -> Iterator[Tally]:
        """Read-modify-write of the totals under an exclusive lock (daemon and commands)."""
        self.folder.mkdir(parents=True, exist_ok=True)
        with open(self.folder / ".tally.lock", "a") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            tally = self.tally()
            yield tally
            text = json.dumps(dataclasses.asdict(tally), sort_keys=True) + "\n"
            _write_atomically(self.folder / "tally.json", text.encode("utf-8"))


def _released_text(envelope: HeldEnvelope) -> str:
    when = time.strftime("%Y-%m-%d %H:%M:%S %Z", time.localtime(envelope.released_at or 0))
    return (
        f"{envelope.tracking_id} was released already, at {when} by {envelope.released_by}, "
        f"to {', '.join(envelope.delivered_to) or 'no recipient'}; a message is released once"
    )

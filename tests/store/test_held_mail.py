"""The quarantine folder (store/held_mail.py): atomic copies, one release, expiry, totals."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from mailweir.store.held_mail import (
    AlreadyReleased,
    HeldEnvelope,
    HeldMailStore,
    NotHeld,
    ReleaseUnderway,
)

RAW = (
    b"From: Offers <offers@bulkdeals.example>\r\n"
    b"To: Priya Raman <priya.raman@harbourlane.example>\r\n"
    b"Subject: Cheap kennel supplies\r\n"
    b"\r\n"
    b"Buy now.\r\n"
)


def _envelope(tracking_id: str = "0h9v2k3m4n5p6q7r", held_at: float = 1_000_000.0) -> HeldEnvelope:
    return HeldEnvelope(
        tracking_id=tracking_id,
        sender="offers@bulkdeals.example",
        recipients=("priya.raman@harbourlane.example", "tobias.lindqvist@harbourlane.example"),
        held_at=held_at,
        size=len(RAW),
        score=0.9991,
        band="spam",
    )


def test_held_mail_hold_keeps_bytes_and_envelope(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path / "quarantine")
    store.hold(RAW, _envelope())
    assert store.raw("0h9v2k3m4n5p6q7r") == RAW
    assert store.envelope("0h9v2k3m4n5p6q7r") == _envelope()
    # Nothing but the two files is left behind (no temporary files).
    assert sorted(p.name for p in store.folder.iterdir()) == [
        "0h9v2k3m4n5p6q7r.eml",
        "0h9v2k3m4n5p6q7r.json",
    ]


def test_held_mail_unknown_and_bad_ids_are_not_held(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    with pytest.raises(NotHeld):
        store.envelope("0h9v2k3m4n5p6q7r")
    with pytest.raises(NotHeld, match="not a tracking id"):
        store.raw("../model.sqlite3")


def test_held_mail_release_happens_once(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    store.hold(RAW, _envelope())
    envelope = store.claim("0h9v2k3m4n5p6q7r")
    with pytest.raises(ReleaseUnderway):
        store.claim("0h9v2k3m4n5p6q7r")  # a second process asking at the same time
    done = store.record_release(envelope, "command", envelope.recipients, (), "250 ok", now=5.0)
    store.unclaim("0h9v2k3m4n5p6q7r")
    assert done.released and done.released_by == "command"
    with pytest.raises(AlreadyReleased, match="released once"):
        store.claim("0h9v2k3m4n5p6q7r")
    assert store.tally().released == {"command": 1, "http": 0, "feedback": 0}


def test_held_mail_failed_release_can_be_tried_again(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    store.hold(RAW, _envelope())
    store.claim("0h9v2k3m4n5p6q7r")
    store.unclaim("0h9v2k3m4n5p6q7r")  # the next hop was down: nothing recorded
    assert not store.claim("0h9v2k3m4n5p6q7r").released


def test_held_mail_expire_takes_only_the_old(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    store.hold(RAW, _envelope("0old000000000000", held_at=100.0))
    store.hold(RAW, _envelope("0new000000000000", held_at=900.0))
    figures = store.figures(retention_days=1, now=100.0 + 86400.0 + 1)
    assert (figures.held, figures.past_retention) == (2, 1)
    assert figures.oldest_age == pytest.approx(86401.0)
    gone = store.expire(older_than=500.0)
    assert [e.tracking_id for e in gone] == ["0old000000000000"]
    assert [e.tracking_id for e in store.envelopes()] == ["0new000000000000"]
    assert store.tally().expired == 1


def test_held_mail_forget_removes_an_unsent_copy(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    store.hold(RAW, _envelope())
    store.forget("0h9v2k3m4n5p6q7r")
    assert store.envelopes() == []


def test_held_mail_damaged_sidecar_is_skipped_in_listings(tmp_path: Path) -> None:
    store = HeldMailStore(tmp_path)
    store.hold(RAW, _envelope())
    (tmp_path / "0broken000000000.json").write_text("{not json")
    assert [e.tracking_id for e in store.envelopes()] == ["0h9v2k3m4n5p6q7r"]
    sidecar = json.loads((tmp_path / "0h9v2k3m4n5p6q7r.json").read_text())
    assert sidecar["format"] == 1 and sidecar["recipients"][0] == "priya.raman@harbourlane.example"

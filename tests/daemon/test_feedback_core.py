"""The feedback core (daemon/feedback.py) on a real SQLite store, without sockets.

Exactness is checked on the store's own counts: a correction changes the count of exactly
the message's token hashes by exactly one in the right column (the training arithmetic of
DESIGN.md, "Learning": presence counts, train and untrain exact inverses).
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from test_forwarded import as_attachment, as_inline, delivered

from mailweir.daemon import scenario
from mailweir.daemon.feedback import (
    MIN_ID_AGREEMENT,
    FeedbackIntake,
    RateLimit,
    TrustedNetworks,
    agreement,
    hashes_of,
    issued_at,
    kind_of,
)
from mailweir.daemon.feedback_types import FeedbackRequest, FeedbackStatus
from mailweir.daemon.forwarded import find_originals
from mailweir.daemon.judge import new_tracking_id
from mailweir.daemon.metrics import Metrics
from mailweir.daemon.settings import FeedbackSettings
from mailweir.daemon.verdict_log import VerdictLog
from mailweir.model.hashing import message_digest
from mailweir.model.tokenize import DEFAULT_OPTIONS
from mailweir.model.types import SPAM
from mailweir.store import ModelStore, StoreBusy, VerdictRecord
from mailweir.store.reports import misfiling_rates

TRACKING = "0ljq3k2c5g1a9b7e"
SETTINGS = FeedbackSettings(
    spam_address="report-spam@harbourlane.example",
    ham_address="report-wanted@harbourlane.example",
    rate_limit_per_hour=3,
    max_message_bytes=100_000,
)


@pytest.fixture
def store(tmp_path: Path) -> Iterator[ModelStore]:
    opened = ModelStore.open(str(tmp_path / "model.sqlite3"), staleness_seconds=0.0)
    try:
        yield opened
    finally:
        opened.close()


def _reminder() -> tuple[bytes, np.ndarray]:
    raw = scenario.overdue_reminder().raw
    return raw, hashes_of(raw, DEFAULT_OPTIONS)


def _verdict(store: ModelStore, hashes: Any, band: str = "spam", tid: str = TRACKING) -> None:
    store.record_verdicts(
        [VerdictRecord(tid, time.time() - 60, 1, 900, 0.997, band, "tag", hashes)]
    )


def _intake(store: ModelStore, metrics: Metrics | None = None, **kwargs: Any) -> FeedbackIntake:
    return FeedbackIntake(store, SETTINGS, DEFAULT_OPTIONS, metrics or Metrics(), **kwargs)


def _counts(store: ModelStore, hashes: Any) -> np.ndarray:
    return np.asarray(store.lookup(hashes)).copy()


def _fed_back(metrics: Metrics, kind: str) -> float:
    return metrics.registry.get_sample_value("mailweir_feedback_total", {"kind": kind}) or 0.0


def _refused(metrics: Metrics, reason: str) -> float:
    labels = {"reason": reason}
    return metrics.registry.get_sample_value("mailweir_feedback_refused_total", labels) or 0.0


def _feedback_rows(store: ModelStore) -> list[tuple[Any, ...]]:
    with store.engine.connect() as conn:
        rows = conn.exec_driver_sql("SELECT tracking_id, kind, channel FROM weir_feedback")
        return [tuple(row) for row in rows]


# -- by tracking id --------------------------------------------------------------------------


async def test_feedback_core_by_id_trains_the_recorded_hashes(store: ModelStore) -> None:
    _, hashes = _reminder()
    _verdict(store, hashes)
    metrics = Metrics()
    before = _counts(store, hashes)
    outcome = await _intake(store, metrics)(FeedbackRequest("ham", "http", tracking_id=TRACKING))
    assert outcome.status is FeedbackStatus.TRAINED
    assert outcome.kind == "false_positive"
    assert (_counts(store, hashes) - before).tolist() == [[1, 0]] * len(hashes)
    assert store.class_count().tolist() == [1, 0]
    assert _fed_back(metrics, "false_positive") == 1
    assert _feedback_rows(store) == [(TRACKING, "false_positive", "http")]


async def test_feedback_core_moves_a_message_trained_the_other_way(store: ModelStore) -> None:
    _, hashes = _reminder()
    store.train(hashes, SPAM, digest=message_digest(hashes), source="import")
    _verdict(store, hashes)
    before = _counts(store, hashes)
    outcome = await _intake(store)(FeedbackRequest("ham", "mail", tracking_id=TRACKING))
    assert outcome.status is FeedbackStatus.MOVED
    assert (_counts(store, hashes) - before).tolist() == [[1, -1]] * len(hashes)
    assert store.class_count().tolist() == [1, 0]


async def test_feedback_core_second_send_is_counted_once(store: ModelStore) -> None:
    _, hashes = _reminder()
    _verdict(store, hashes)
    metrics = Metrics()
    intake = _intake(store, metrics)
    request = FeedbackRequest("ham", "http", tracking_id=TRACKING)
    await intake(request)
    after_first = _counts(store, hashes)
    again = await intake(request)
    assert again.status is FeedbackStatus.ALREADY_KNOWN
    assert again.accepted
    assert (_counts(store, hashes) == after_first).all()
    assert _fed_back(metrics, "false_positive") == 1
    assert len(_feedback_rows(store)) == 1


async def test_feedback_core_rates_see_the_false_positive(store: ModelStore) -> None:
    # reports.py: a false positive is a message judged spam or suspect sent back as wanted.
    _, hashes = _reminder()
    _verdict(store, hashes)
    _verdict(store, hashes[:10], band="ham", tid="ham0000000000001")
    before = misfiling_rates(store.engine, 3600.0)
    await _intake(store)(FeedbackRequest("ham", "http", tracking_id=TRACKING))
    after = misfiling_rates(store.engine, 3600.0)
    assert (before.false_positives, after.false_positives) == (0, 1)
    assert after.judged == 2
    assert after.false_positive_rate == 0.5


@pytest.mark.parametrize(
    ("correction", "band", "kind"),
    [
        ("ham", "spam", "false_positive"),
        ("ham", "suspect", "false_positive"),
        ("spam", "ham", "false_negative"),
        ("spam", "spam", "confirmation"),
        ("ham", "ham", "confirmation"),
        ("spam", "unjudged", "confirmation"),
        ("ham", None, "confirmation"),
    ],
)
def test_feedback_core_kind(correction: Any, band: str | None, kind: str) -> None:
    assert kind_of(correction, band).value == kind


async def test_feedback_core_unknown_id_without_message(store: ModelStore) -> None:
    metrics = Metrics()
    outcome = await _intake(store, metrics)(FeedbackRequest("spam", "http", tracking_id="nope"))
    assert outcome.status is FeedbackStatus.NO_ORIGINAL
    assert _refused(metrics, "no_original") == 1
    assert store.class_count().tolist() == [0, 0]
    assert _feedback_rows(store) == []


async def test_feedback_core_waits_for_a_verdict_still_queued(store: ModelStore) -> None:
    _, hashes = _reminder()
    verdict_log = VerdictLog(store, batch_seconds=3600.0)  # never writes on its own here
    verdict_log.add(VerdictRecord(TRACKING, time.time(), 1, 900, 0.997, "spam", "tag", hashes))
    intake = _intake(store, verdict_log=verdict_log)
    outcome = await intake(FeedbackRequest("ham", "http", tracking_id=TRACKING))
    assert outcome.status is FeedbackStatus.TRAINED
    assert outcome.kind == "false_positive"
    assert verdict_log.pending == 0


async def test_feedback_core_waits_for_a_batch_being_written(store: ModelStore) -> None:
    # The verdict log has taken the record off its queue and is writing it: nothing pending,
    # nothing in the store yet.  A fresh id is waited for; the record lands a moment later.
    _, hashes = _reminder()
    tracking = new_tracking_id()

    class Writing:
        pending = 0

        async def flush(self) -> None:
            raise AssertionError("nothing is queued")

    async def land() -> None:
        await asyncio.sleep(0.2)
        await asyncio.to_thread(_verdict, store, hashes, "spam", tracking)

    writer = asyncio.create_task(land())
    outcome = await _intake(store, verdict_log=Writing())(
        FeedbackRequest("ham", "http", tracking_id=tracking)
    )
    await writer
    assert (outcome.status, outcome.kind) == (FeedbackStatus.TRAINED, "false_positive")


def test_feedback_core_issued_at_reads_our_ids() -> None:
    before = time.time()
    stamp = issued_at(new_tracking_id())
    assert stamp is not None and before - 0.01 <= stamp <= time.time() + 0.01
    assert issued_at("not-one-of-ours") is None
    assert issued_at("zzzzzzzzzzzzzzzz") is None  # not base32hex


# -- by message ------------------------------------------------------------------------------


async def test_feedback_core_raw_without_id_trains_its_own_tokens(store: ModelStore) -> None:
    raw, hashes = _reminder()
    outcome = await _intake(store)(FeedbackRequest("ham", "http", raw=raw))
    assert outcome.status is FeedbackStatus.TRAINED
    assert outcome.kind == "confirmation"  # no verdict to disagree with
    assert (_counts(store, hashes)[:, 0] == 1).all()
    assert _feedback_rows(store) == [(None, "confirmation", "http")]


async def test_feedback_core_raw_with_expired_hashes_keeps_the_id(store: ModelStore) -> None:
    raw, hashes = _reminder()
    _verdict(store, None)  # past the retention window: the row stays, the hashes are gone
    outcome = await _intake(store)(FeedbackRequest("ham", "mail", raw=delivered(raw)))
    assert outcome.status is FeedbackStatus.TRAINED
    assert outcome.kind == "false_positive"
    assert (_counts(store, hashes)[:, 0] == 1).all()
    assert _feedback_rows(store) == [(TRACKING, "false_positive", "mail")]


async def test_feedback_core_inline_forward_with_id_is_exact(store: ModelStore) -> None:
    raw, hashes = _reminder()
    _verdict(store, hashes)
    (original,) = find_originals(as_inline(delivered(raw)))
    assert hashes_of(original.raw, DEFAULT_OPTIONS).tolist() != hashes.tolist()  # mangled
    request = FeedbackRequest("ham", "mail", original.tracking_id, original.raw)
    outcome = await _intake(store)(request)
    assert outcome.status is FeedbackStatus.TRAINED
    assert (_counts(store, hashes)[:, 0] == 1).all()
    assert store.class_count().tolist() == [1, 0]


async def test_feedback_core_id_of_another_message_is_ignored(store: ModelStore) -> None:
    # A junk sender writes the id of a real message into its own mail (observe mode strips
    # nothing); the report must not train the real message's tokens as spam.
    _, wanted = _reminder()
    _verdict(store, wanted, band="ham")
    junk = scenario.generate(1, "spam", 5)[0].raw
    forged = delivered(junk, TRACKING, band="ham")
    outcome = await _intake(store)(FeedbackRequest("spam", "mail", raw=forged))
    assert outcome.status is FeedbackStatus.TRAINED
    assert outcome.kind == "confirmation"
    junk_hashes = hashes_of(junk, DEFAULT_OPTIONS)
    assert (_counts(store, junk_hashes)[:, 1] == 1).all()
    only_wanted = np.setdiff1d(wanted, junk_hashes)
    assert (_counts(store, only_wanted) == 0).all()
    assert _feedback_rows(store) == [(None, "confirmation", "mail")]


def test_feedback_core_agreement_separates_forwards_from_strangers() -> None:
    # Backs MIN_ID_AGREEMENT: an inline forward of a message keeps most of its tokens; a junk
    # message does not share that much with a wanted one (or the other way round).  Messages
    # from one template (two appointment notes) do share most tokens: there the check cannot
    # tell them apart, and training one in place of the other is nearly the same correction.
    mail = scenario.generate(15, "ham", 3) + scenario.generate(15, "spam", 3)
    hashes = [hashes_of(m.raw, DEFAULT_OPTIONS) for m in mail]
    for message, own in zip(mail, hashes, strict=True):
        if b"multipart" in message.raw:
            continue  # the inline builder quotes plain-text bodies
        (forward,) = find_originals(as_inline(delivered(message.raw)))
        assert agreement(hashes_of(forward.raw, DEFAULT_OPTIONS), own) >= MIN_ID_AGREEMENT
    labels = [m.label for m in mail]
    strangers = [
        agreement(a, b)
        for i, a in enumerate(hashes)
        for j, b in enumerate(hashes)
        if labels[i] != labels[j]
    ]
    assert max(strangers) < MIN_ID_AGREEMENT


async def test_feedback_core_store_failure_changes_nothing(store: ModelStore) -> None:
    _, hashes = _reminder()
    _verdict(store, hashes)

    class FailingLog:
        """The store, but writing the feedback row fails (a locked database)."""

        def __getattr__(self, name: str) -> Any:
            return getattr(store, name)

        def record_feedback(self, entry: Any) -> None:
            raise StoreBusy("database is locked")

    intake = FeedbackIntake(FailingLog(), SETTINGS, DEFAULT_OPTIONS, Metrics())
    with pytest.raises(StoreBusy):
        await intake(FeedbackRequest("ham", "http", tracking_id=TRACKING))
    assert (_counts(store, hashes) == 0).all()
    assert store.class_count().tolist() == [0, 0]
    assert store.stats().ledger_rows == 0


# -- trust and rate ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("peer", "trusted"),
    [
        (("127.0.0.1", 40000), True),
        (("::1", 40000, 0, 0), True),
        (("::ffff:127.0.0.1", 40000, 0, 0), True),
        (("192.0.2.25", 25), True),
        (("198.51.100.7", 25), False),
        (("fe80::1%eth0", 25, 0, 2), False),
        ("192.0.2.9", True),
        (None, False),
        ("", False),
        ("/run/mailweir.sock", False),
    ],
)
def test_feedback_core_trusted_networks(peer: object, trusted: bool) -> None:
    networks = TrustedNetworks(("127.0.0.0/8", "::1/128", "192.0.2.0/24"))
    assert (peer in networks) is trusted


def test_feedback_core_rate_limit_slides_over_the_hour() -> None:
    now = [1000.0]
    limit = RateLimit(2, clock=lambda: now[0])
    assert limit.take("tobias") and limit.take("tobias")
    assert not limit.allows("tobias") and not limit.take("tobias")
    assert limit.take("priya")  # per sender
    now[0] += 3600.0
    assert limit.take("tobias")


def test_feedback_core_rate_limit_zero_is_unlimited() -> None:
    limit = RateLimit(0)
    assert all(limit.take("tobias") for _ in range(1000))


def test_feedback_core_screen_recipient(store: ModelStore) -> None:
    metrics = Metrics()
    intake = _intake(store, metrics)
    local = ("127.0.0.1", 5000)
    ham, spam = SETTINGS.ham_address, SETTINGS.spam_address
    staff = "priya.raman@harbourlane.example"
    screen = intake.screen_recipient
    assert screen(local, "t@harbourlane.example", [], [], staff) is None
    assert screen(local, "t@harbourlane.example", [], [], ham.upper()).code == 250
    assert screen(local, "t@harbourlane.example", [], [ham], staff).code == 452
    assert screen(local, "t@harbourlane.example", [], [staff], ham).code == 452
    assert screen(local, "t@harbourlane.example", [], [ham], spam).code == 452
    assert screen(("198.51.100.7", 25), "x@mail.example", [], [], spam).code == 550
    assert screen(local, "t@harbourlane.example", ["SIZE=200000"], [], spam).code == 552
    assert _refused(metrics, "untrusted") == 1
    assert _refused(metrics, "invalid") == 1


async def test_feedback_core_mail_checks_a_forged_id_too(store: ModelStore) -> None:
    # The same forgery arriving as an attachment at the spam address.
    _, wanted = _reminder()
    _verdict(store, wanted, band="ham")
    junk = scenario.generate(1, "spam", 5)[0].raw
    forward = as_attachment(delivered(junk, TRACKING, band="ham"))
    intake = _intake(store)
    reply = await intake.receive_mail(
        ("127.0.0.1", 5000), "t@harbourlane.example", [SETTINGS.spam_address], forward
    )
    assert reply.code == 250 and "no tracking id" in reply.text
    only_wanted = np.setdiff1d(wanted, hashes_of(junk, DEFAULT_OPTIONS))
    assert (_counts(store, only_wanted) == 0).all()
    assert _feedback_rows(store) == [(None, "confirmation", "mail")]

"""The verdict and feedback logs."""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy import text

from mailweir.store import (
    FeedbackChannel,
    FeedbackKind,
    FeedbackRecord,
    ModelStore,
    StoreError,
    VerdictRecord,
)


def verdict(tracking_id: str, received_at: float, hashes: np.ndarray | None) -> VerdictRecord:
    return VerdictRecord(
        tracking_id=tracking_id,
        received_at=received_at,
        recipients=2,
        size=48_213,
        score=0.993,
        band="spam",
        action="reroute",
        token_hashes=hashes,
    )


def test_verdict_round_trip(store: ModelStore) -> None:
    hashes = np.array([-(2**63), -1, 0, 7, 2**63 - 1], dtype=np.int64)
    store.record_verdicts(
        [verdict("hl-0001", 1_764_633_600.25, hashes), verdict("hl-0002", 1.0, None)]
    )
    found = store.find_verdict("hl-0001")
    assert found is not None
    assert found.token_hashes is not None
    assert found.token_hashes.dtype == np.int64
    assert found.token_hashes.tolist() == hashes.tolist()
    assert (found.received_at, found.recipients, found.size) == (1_764_633_600.25, 2, 48_213)
    assert (found.score, found.band, found.action) == (0.993, "spam", "reroute")
    assert store.find_verdict("hl-0002").token_hashes is None  # type: ignore[union-attr]
    assert store.find_verdict("hl-missing") is None
    assert store.stats().verdict_rows == 2


def test_verdict_unscored_keeps_none_score(store: ModelStore) -> None:
    record = VerdictRecord("hl-0003", 5.0, 1, 900, None, "unjudged", "pass", None)
    store.record_verdicts([record])
    assert store.find_verdict("hl-0003") == record


def test_verdict_empty_batch_is_fine(store: ModelStore) -> None:
    store.record_verdicts([])
    assert store.stats().verdict_rows == 0


def test_verdict_duplicate_tracking_id_is_an_error_and_batch_is_atomic(store: ModelStore) -> None:
    store.record_verdicts([verdict("hl-1", 1.0, None)])
    with pytest.raises(StoreError):
        store.record_verdicts([verdict("hl-2", 1.0, None), verdict("hl-1", 2.0, None)])
    assert store.find_verdict("hl-2") is None


def test_expire_verdict_tokens_keeps_rows(store: ModelStore) -> None:
    hashes = np.arange(5, dtype=np.int64)
    store.record_verdicts(
        [verdict("old", 100.0, hashes), verdict("new", 300.0, hashes), verdict("bare", 50.0, None)]
    )
    assert store.expire_verdict_tokens(older_than=200.0) == 1
    assert store.expire_verdict_tokens(older_than=200.0) == 0
    old, new = store.find_verdict("old"), store.find_verdict("new")
    assert old is not None and old.token_hashes is None and old.score == 0.993
    assert new is not None and new.token_hashes is not None
    assert store.stats().verdict_rows == 3


def test_feedback_recorded(store: ModelStore) -> None:
    store.record_feedback(
        FeedbackRecord(FeedbackKind.FALSE_POSITIVE, FeedbackChannel.MAIL, 10.0, tracking_id="hl-1")
    )
    store.record_feedback(
        FeedbackRecord(FeedbackKind.FALSE_NEGATIVE, FeedbackChannel.HTTP, 11.0, digest=b"d" * 16)
    )
    with store.engine.connect() as conn:
        rows = conn.execute(
            text("SELECT tracking_id, digest, kind, channel FROM weir_feedback ORDER BY id")
        ).all()
    assert [(r[0], r[1] and bytes(r[1]), r[2], r[3]) for r in rows] == [
        ("hl-1", None, "false_positive", "mail"),
        (None, b"d" * 16, "false_negative", "http"),
    ]


def test_feedback_unknown_kind_is_refused(store: ModelStore) -> None:
    with pytest.raises(ValueError):
        store.record_feedback(FeedbackRecord("praise", FeedbackChannel.MAIL, 1.0))  # type: ignore[arg-type]

"""``mailweir calibrate`` on a store filled through its API with verdicts and corrections."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from mailweir.daemon import calibrate, cli
from mailweir.model import evaluate
from mailweir.store import ModelStore
from mailweir.store.verdicts import FeedbackChannel, FeedbackKind, FeedbackRecord, VerdictRecord

NOW = 1_800_000_000.0


def _verdict(n: int, score: float, band: str, age_days: float = 1.0) -> VerdictRecord:
    return VerdictRecord(
        tracking_id=f"hlv-{n:05d}",
        received_at=NOW - age_days * 86400.0,
        recipients=1,
        size=4096,
        score=score,
        band=band,
        action="tag" if band != "ham" else "pass",
        token_hashes=None,
    )


def _band(score: float) -> str:
    return "spam" if score >= 0.99 else "suspect" if score >= 0.5 else "ham"


def _correct(store: ModelStore, n: int, kind: FeedbackKind) -> None:
    store.record_feedback(
        FeedbackRecord(kind, FeedbackChannel.MAIL, NOW - 3600.0, tracking_id=f"hlv-{n:05d}")
    )


@pytest.fixture
def history_db(tmp_path: Path) -> tuple[str, np.ndarray, np.ndarray]:
    """200 ham scored low and 100 spam scored high, with a few misfilings users corrected."""
    rng = np.random.default_rng(17)
    scores = np.r_[rng.uniform(0.0, 0.4, 200), rng.uniform(0.6, 1.0, 100)]
    labels = np.r_[np.zeros(200, np.int64), np.ones(100, np.int64)]
    scores[[3, 4]] = [0.995, 0.7]  # wanted mail filed spam and suspect: users send them back
    scores[[250, 251]] = [0.2, 0.3]  # spam that passed as ham: users report it
    scores[299] = 0.9999
    db = str(tmp_path / "site.sqlite3")
    store = ModelStore.open(db)
    try:
        store.record_verdicts([_verdict(n, float(s), _band(s)) for n, s in enumerate(scores)])
        store.record_verdicts([_verdict(999, 0.999, "spam", age_days=400.0)])  # out of window
        store.record_verdicts(
            [VerdictRecord("hlv-unjudged", NOW - 60, 1, 100, None, "unjudged", "pass", None)]
        )
        for n in (3, 4):
            _correct(store, n, FeedbackKind.FALSE_NEGATIVE)  # first said spam ...
            _correct(store, n, FeedbackKind.FALSE_POSITIVE)  # ... then wanted: the last counts
        for n in (250, 251):
            _correct(store, n, FeedbackKind.FALSE_NEGATIVE)
        _correct(store, 10, FeedbackKind.CONFIRMATION)
    finally:
        store.close()
    return db, scores, labels


def test_calibrate_history_labels_follow_the_latest_correction(
    history_db: tuple[str, np.ndarray, np.ndarray],
) -> None:
    db, scores, labels = history_db
    store = ModelStore.open(db, create=False)
    try:
        history = calibrate.read_history(store.engine, NOW - 90 * 86400.0, NOW)
    finally:
        store.close()
    order = np.argsort(history.scores)
    assert history.corrected == 4
    assert np.array_equal(history.scores[order], np.sort(scores))
    assert np.array_equal(history.labels[order], labels[np.argsort(scores)])


def test_calibrate_json_proposes_cutoffs_within_the_target(
    history_db: tuple[str, np.ndarray, np.ndarray], capsys: pytest.CaptureFixture[str]
) -> None:
    db, scores, labels = history_db
    argv = ["calibrate", "--db", db, "--now", str(NOW), "--target-fpr", "0.001", "--json"]
    assert cli.main(argv) == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["messages"], report["ham"], report["spam"]) == (300, 200, 100)
    found = {p["name"]: p for p in report["proposals"]}
    spam = found["proposed spam_threshold"]
    # Oracle: the same lowest cut-off computed from the known labels by model.evaluate, whose
    # ROC matches scikit-learn's roc_curve (tests/model/test_evaluate.py).
    assert spam["cutoff"] == evaluate.cutoff_for_false_positive_rate(labels, scores, 0.001)
    assert spam["false_positives"] == 0 and spam["cutoff"] == 0.9999
    current = found["current spam_threshold"]
    assert (current["false_positives"], current["false_positive_rate"]) == (1, 1 / 200)
    # Two spam passed as ham below every cut-off: both FN rates count them.
    assert found["current suspect_threshold"]["false_negatives"] == 2
    suspect = found["proposed suspect_threshold"]
    assert suspect["false_positive_rate"] <= 0.01 and suspect["cutoff"] <= spam["cutoff"]


def test_calibrate_text_warns_when_history_is_too_small(
    history_db: tuple[str, np.ndarray, np.ndarray], capsys: pytest.CaptureFixture[str]
) -> None:
    db, _, _ = history_db
    assert cli.main(["calibrate", "--db", db, "--now", str(NOW)]) == 0
    out = capsys.readouterr().out
    assert "300 judged messages" in out and "proposed spam_threshold" in out
    assert "smallest false-positive rate this history can show is 0.5000%" in out


def test_calibrate_without_both_classes_proposes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = str(tmp_path / "quiet.sqlite3")
    store = ModelStore.open(db)
    try:
        store.record_verdicts([_verdict(n, 0.1, "ham") for n in range(5)])
    finally:
        store.close()
    assert cli.main(["calibrate", "--db", db, "--now", str(NOW)]) == 1
    assert "no proposal" in capsys.readouterr().out


def test_calibrate_top_score_ham_proposes_just_above_it() -> None:
    # The surest message was wanted mail: only a cut-off above every score keeps FP at zero.
    history = calibrate.History(np.array([0.2, 0.9, 0.97]), np.array([0, 1, 0]), corrected=1)
    found = calibrate.propose(history, 0.0, 0.0, calibrate.PolicySettings())
    spam = next(p for p in found if p.name == "proposed spam_threshold")
    assert spam.cutoff == np.nextafter(0.97, np.inf)
    assert (spam.false_positives, spam.false_negatives) == (0, 1)

"""Reports over a real store (SQLite, and PostgreSQL when configured: see conftest.py), filled
through the store's API (``ModelStore``).

The expected figures are counted by hand from the constructed logs below (the definitions are
in the docstring of ``store/reports.py``); the score histogram is checked against
``numpy.histogram`` as an oracle, which uses the same half-open bins with the last one closed.
"""

from __future__ import annotations

import datetime as dt
import math
import time
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import Engine, event

from mailweir.store import ModelStore, reports
from mailweir.store.engine import make_engine
from mailweir.store.errors import StoreError
from mailweir.store.verdicts import FeedbackChannel, FeedbackKind, FeedbackRecord, VerdictRecord

# 2026-11-20 12:00:00 UTC
NOW = dt.datetime(2026, 11, 20, 12, tzinfo=dt.UTC).timestamp()
HOUR = 3600.0
FP, FN, OK = FeedbackKind.FALSE_POSITIVE, FeedbackKind.FALSE_NEGATIVE, FeedbackKind.CONFIRMATION


@pytest.fixture
def engine(store: ModelStore) -> Engine:
    return store.engine


def verdict(tid: str, at: float, band: str, score: float | None = 0.5) -> VerdictRecord:
    action = "pass" if band in ("ham", "unjudged", "failed") else "tag"
    return VerdictRecord(tid, at, 1, 2048, score, band, action, None)


def add_feedback(store: ModelStore, kind: FeedbackKind, tid: str | None, at: float) -> None:
    store.record_feedback(FeedbackRecord(kind, FeedbackChannel.MAIL, at, tid))


@pytest.fixture
def constructed(store: ModelStore) -> Engine:
    """A day of mail and a week-old batch, with every kind of correction that matters.

    Last 24 hours: 4 ham, 3 suspect, 3 spam judged (10), plus 2 unjudged and 1 failed.
    False positives: s1 (spam), q1 (suspect, sent back twice).  False negative: h1.
    Not counted: s2 confirmed; h2 marked false_positive although judged ham (no such thing);
    h3 said spam then changed to confirmation (latest word wins); u1 unjudged sent back;
    feedback without a tracking id; q2's correction arrives after NOW.
    Three days ago: 5 more judged (2 ham, 3 spam), s9 a false positive.
    """
    day = [
        verdict("h1", NOW - 1 * HOUR, "ham", 0.01),
        verdict("h2", NOW - 2 * HOUR, "ham", 0.02),
        verdict("h3", NOW - 3 * HOUR, "ham", 0.03),
        verdict("h4", NOW - 23 * HOUR, "ham", 0.04),
        verdict("q1", NOW - 4 * HOUR, "suspect", 0.6),
        verdict("q2", NOW - 5 * HOUR, "suspect", 0.7),
        verdict("q3", NOW, "suspect", 0.8),  # arrives exactly at NOW: inside (NOW-24h, NOW]
        verdict("s1", NOW - 6 * HOUR, "spam", 0.995),
        verdict("s2", NOW - 7 * HOUR, "spam", 0.999),
        verdict("s3", NOW - 8 * HOUR, "spam", 1.0),
        verdict("u1", NOW - 9 * HOUR, "unjudged", None),
        verdict("u2", NOW - 10 * HOUR, "unjudged", None),
        verdict("f1", NOW - 11 * HOUR, "failed", None),
        verdict("edge", NOW - 24 * HOUR, "ham", 0.1),  # exactly 24 h old: outside the 24h window
    ]
    old = [verdict(f"o{i}", NOW - 72 * HOUR - i, "ham", 0.05) for i in range(2)] + [
        verdict(f"s{9 - i}", NOW - 72 * HOUR - i, "spam", 0.99) for i in range(3)
    ]
    store.record_verdicts(day + old)
    for kind, tid, at in [
        (FP, "s1", NOW - 0.5 * HOUR),
        (FP, "q1", NOW - 0.4 * HOUR),
        (FP, "q1", NOW - 0.3 * HOUR),
        (FN, "h1", NOW - 0.2 * HOUR),
        (OK, "s2", NOW - 0.2 * HOUR),
        (FP, "h2", NOW - 0.2 * HOUR),
        (FN, "h3", NOW - 0.6 * HOUR),
        (OK, "h3", NOW - 0.1 * HOUR),
        (FP, "u1", NOW - 0.1 * HOUR),
        (FP, None, NOW - 0.1 * HOUR),
        (FP, "q2", NOW + 1 * HOUR),
        (FP, "s9", NOW - 48 * HOUR),
    ]:
        add_feedback(store, kind, tid, at)
    return store.engine


def test_misfiling_rates_24h_exact(constructed: Engine) -> None:
    rates = reports.misfiling_rates(constructed, 24 * HOUR, now=NOW)
    # 4 ham (h1-h4) + 3 suspect + 3 spam; "edge" is exactly 24 h old and falls outside.
    assert rates.judged == 10
    assert (rates.false_positives, rates.false_negatives) == (2, 1)
    assert rates.false_positive_rate == pytest.approx(2 / 10)
    assert rates.false_negative_rate == pytest.approx(1 / 10)


def test_misfiling_rates_7d_exact(constructed: Engine) -> None:
    rates = reports.misfiling_rates(constructed, 7 * 24 * HOUR, now=NOW)
    assert rates.judged == 10 + 1 + 5  # the day, "edge", the old batch
    assert (rates.false_positives, rates.false_negatives) == (3, 1)
    assert rates.false_positive_rate == pytest.approx(3 / 16)


def test_misfiling_rates_later_feedback_counts_once_it_arrives(constructed: Engine) -> None:
    later = reports.misfiling_rates(constructed, 24 * HOUR, now=NOW + 2 * HOUR)
    # q2's correction (NOW + 1 h) now counts; h4 (23 h old at NOW) has left the window.
    assert later.judged == 9
    assert later.false_positives == 3


def test_misfiling_rates_empty_store_is_nan(engine: Engine) -> None:
    rates = reports.misfiling_rates(engine, 24 * HOUR, now=NOW)
    assert (rates.judged, rates.false_positives, rates.false_negatives) == (0, 0, 0)
    assert math.isnan(rates.false_positive_rate)
    assert math.isnan(rates.false_negative_rate)


def test_daily_report_counts_by_band_per_utc_day(constructed: Engine) -> None:
    days = reports.daily_report(constructed, days=5, now=NOW)
    assert [d.day for d in days] == [dt.date(2026, 11, 16) + dt.timedelta(days=i) for i in range(5)]
    by_day = {d.day: d for d in days}
    # NOW is 12:00, so NOW - 13 h and older (h4, edge) fall on the 19th.
    today, yesterday = by_day[dt.date(2026, 11, 20)], by_day[dt.date(2026, 11, 19)]
    assert today.by_band == {"ham": 3, "suspect": 3, "spam": 3, "unjudged": 2, "failed": 1}
    assert yesterday.by_band == {"ham": 2, "suspect": 0, "spam": 0, "unjudged": 0, "failed": 0}
    old = by_day[dt.date(2026, 11, 17)]
    assert old.by_band["ham"] == 2 and old.by_band["spam"] == 3
    assert by_day[dt.date(2026, 11, 16)].total == 0
    assert by_day[dt.date(2026, 11, 18)].total == 0


def test_daily_report_misfiling_per_day(constructed: Engine) -> None:
    by_day = {d.day: d for d in reports.daily_report(constructed, days=5, now=NOW)}
    today = by_day[dt.date(2026, 11, 20)]
    assert (today.judged, today.false_positives, today.false_negatives) == (9, 2, 1)
    assert today.false_positive_rate == pytest.approx(2 / 9)
    old = by_day[dt.date(2026, 11, 17)]
    assert (old.false_positives, old.false_positive_rate) == (1, pytest.approx(1 / 5))
    assert math.isnan(by_day[dt.date(2026, 11, 18)].false_positive_rate)


def test_score_histogram_matches_numpy(store: ModelStore) -> None:
    rng = np.random.default_rng(7)
    scores = np.concatenate([rng.beta(0.3, 0.3, 400), [0.0, 0.05, 0.5, 0.95, 1.0]])
    store.record_verdicts(
        [verdict(f"m{i}", NOW - i, "ham", float(s)) for i, s in enumerate(scores)]
        + [verdict("none", NOW, "failed", None)],
    )
    hist = reports.score_histogram(store.engine, days=1, now=NOW)
    expected, _ = np.histogram(scores, bins=np.array(hist.edges))
    assert hist.edges[0] == 0.0 and hist.edges[-1] == 1.0 and len(hist.edges) == 21
    assert list(hist.counts) == expected.tolist()
    assert sum(hist.counts) == len(scores)


def test_score_histogram_ignores_older_days(store: ModelStore) -> None:
    store.record_verdicts([verdict("old", NOW - 30 * 24 * HOUR, "spam", 0.99)])
    assert sum(reports.score_histogram(store.engine, days=14, now=NOW).counts) == 0


def test_model_summary_after_training(store: ModelStore) -> None:
    assert reports.model_summary(store.engine) == reports.ModelSummary(0, 0, 0, None)
    before = time.time()
    for hashes, label, digest in [([1, 2, 3], 0, b"a"), ([3, 4], 1, b"b"), ([5], 1, b"c")]:
        store.train(np.array(hashes, np.int64), label, digest=digest * 16, source="test")
    summary = reports.model_summary(store.engine)
    assert (summary.tokens, summary.ham_messages, summary.spam_messages) == (5, 1, 2)
    assert summary.last_trained_at is not None
    assert before <= summary.last_trained_at <= time.time()
    store.untrain(np.array([5], np.int64), digest=b"c" * 16)
    assert reports.model_summary(store.engine).tokens == 4  # token 5 is gone from the model


def test_model_summary_size_from_memory_matches_the_table(store: ModelStore) -> None:
    """The daemon takes the size from the store's vocabulary summary (kept in memory across
    its own training) instead of counting the table each minute: the two always agree."""

    def both() -> tuple[reports.ModelSummary, reports.ModelSummary]:
        known = reports.model_summary(store.engine, tokens=store.vocabulary().size)
        return known, reports.model_summary(store.engine)

    known, counted = both()
    assert known == counted
    rng = np.random.default_rng(5)
    for n in range(30):
        hashes = np.unique(rng.integers(0, 60, size=8)).astype(np.int64)
        store.train(hashes, n % 2, digest=bytes([n]) * 16, source="test")
        if n % 7 == 6:
            store.untrain(hashes, digest=bytes([n]) * 16)
        known, counted = both()
        assert known == counted


def test_model_summary_with_known_size_reads_no_token_row(store: ModelStore) -> None:
    store.train(np.array([1, 2, 3], np.int64), 0, digest=b"a" * 16, source="test")
    statements: list[str] = []
    event.listen(store.engine, "before_cursor_execute", lambda *a: statements.append(a[2]))
    reports.model_summary(store.engine, tokens=3)
    assert statements and not [s for s in statements if "weir_token" in s]


def test_ping_answers_true(engine: Engine) -> None:
    assert reports.ping(engine) is True


def test_ping_unreachable_database_raises_store_error(tmp_path: Path) -> None:
    engine = make_engine(str(tmp_path / "gone" / "model.sqlite3"))
    (tmp_path / "gone").rmdir()  # make_engine created the folder; SQLite cannot open the file
    with pytest.raises(StoreError):
        reports.ping(engine)
    engine.dispose()

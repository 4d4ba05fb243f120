"""Read-only reports over the verdict log and the feedback log, for metrics and the status page.

Definitions (exact; every figure below is a count of verdict rows, ``weir_verdict``):

* A message is *judged* when its verdict band is ``ham``, ``suspect`` or ``spam``; messages
  marked ``unjudged`` (cold-start guard) or ``failed`` (scoring raised) are not.
* A message's *correction* is the latest feedback row (highest ``id``) carrying its tracking
  id, among the rows received up to the report's ``now``.  A user who first says "spam" and
  then "wanted" has the final word; sending the same correction twice counts once.
* A *false positive* is a message judged ``spam`` or ``suspect`` whose correction has kind
  ``false_positive`` (the user sent it back as wanted mail).
* A *false negative* is a message judged ``ham`` whose correction has kind ``false_negative``
  (the user sent it back as spam).
* Over a window ``(now - w, now]`` of arrival times (``received_at``)::

      false-positive rate = false positives among messages judged in the window
                            / messages judged in the window
      false-negative rate = false negatives among messages judged in the window
                            / messages judged in the window

  Both are NaN when nothing was judged.  The window is placed on the message's arrival, not
  on the feedback's, so the numerator is always a subset of the denominator; a correction
  that arrives later raises the rate of the window its message belongs to.  The most recent
  windows therefore read low until users have had time to report.
* Feedback without a tracking id (a raw message with no id in it) cannot be joined to a
  verdict and is not part of the rates.

Days are UTC calendar days.  Every query opens its connection with ``READ_ONLY`` so SQLite
runs it in autocommit mode and never takes the write lock (``engine.py``).
"""

from __future__ import annotations

import datetime as dt
import math
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any, Final

from sqlalchemy import Connection, Engine, Integer, and_, case, func, select
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.sql.expression import ColumnElement, FunctionElement

from mailweir.store import schema
from mailweir.store.engine import READ_ONLY
from mailweir.store.errors import store_errors

DAY: Final = 86400.0
JUDGED_BANDS: Final = ("ham", "suspect", "spam")
SPAM_BANDS: Final = ("suspect", "spam")  # a wanted message filed here is a false positive
ALL_BANDS: Final = ("ham", "suspect", "spam", "unjudged", "failed")
FALSE_POSITIVE: Final = "false_positive"  # store.verdicts.FeedbackKind values
FALSE_NEGATIVE: Final = "false_negative"
HISTOGRAM_BINS: Final = 20


class _floor(FunctionElement[int]):
    """FLOOR(x) for x >= 0; SQLite lacks FLOOR unless built with its math functions."""

    type = Integer()
    inherit_cache = True


@compiles(_floor)
def _floor_default(element: _floor, compiler: Any, **kw: Any) -> str:
    return f"FLOOR({compiler.process(element.clauses, **kw)})"


@compiles(_floor, "sqlite")
def _floor_sqlite(element: _floor, compiler: Any, **kw: Any) -> str:
    # CAST truncates toward zero, which is FLOOR for the non-negative values used here.
    return f"CAST({compiler.process(element.clauses, **kw)} AS INTEGER)"


def _rate(part: int, whole: int) -> float:
    return part / whole if whole else math.nan


@dataclass(frozen=True)
class MisfilingRates:
    """Misfiling over one window of arrival times ``(start, end]``."""

    start: float
    end: float
    judged: int
    false_positives: int
    false_negatives: int

    @property
    def false_positive_rate(self) -> float:
        return _rate(self.false_positives, self.judged)

    @property
    def false_negative_rate(self) -> float:
        return _rate(self.false_negatives, self.judged)


@dataclass(frozen=True)
class DayReport:
    """One UTC day: messages by band, and the misfiling among those judged."""

    day: dt.date
    by_band: dict[str, int] = field(default_factory=dict)
    false_positives: int = 0
    false_negatives: int = 0

    @property
    def total(self) -> int:
        return sum(self.by_band.values())

    @property
    def judged(self) -> int:
        return sum(self.by_band.get(band, 0) for band in JUDGED_BANDS)

    @property
    def false_positive_rate(self) -> float:
        return _rate(self.false_positives, self.judged)

    @property
    def false_negative_rate(self) -> float:
        return _rate(self.false_negatives, self.judged)


@dataclass(frozen=True)
class ScoreHistogram:
    """Counts of scores in ``len(counts)`` equal bins; bin i is ``[edges[i], edges[i+1])``,
    the last bin closed at 1.0."""

    edges: tuple[float, ...]
    counts: tuple[int, ...]


@dataclass(frozen=True)
class ModelSummary:
    tokens: int
    ham_messages: int
    spam_messages: int
    last_trained_at: float | None  # unix time of the newest ledger entry; None: never trained


@contextmanager
def _reading(engine: Engine) -> Iterator[Connection]:
    with store_errors(), engine.connect().execution_options(**{READ_ONLY: True}) as conn:
        yield conn


def _days(start: float, end: float) -> ColumnElement[bool]:
    received = schema.verdict.c.received_at
    return and_(received >= start, received < end)


def _trailing(start: float, end: float) -> ColumnElement[bool]:
    received = schema.verdict.c.received_at
    return and_(received > start, received <= end)


def _corrections(now: float) -> Any:
    """Subquery: each tracking id's latest feedback row received up to *now*."""
    f = schema.feedback
    latest = (
        select(func.max(f.c.id).label("id"))
        .where(f.c.tracking_id.is_not(None), f.c.received_at <= now)
        .group_by(f.c.tracking_id)
        .subquery()
    )
    return select(f.c.tracking_id, f.c.kind).join(latest, latest.c.id == f.c.id).subquery()


def _misfiling_columns(corrections: Any) -> tuple[ColumnElement[Any], ColumnElement[Any]]:
    v = schema.verdict
    fp = case((and_(v.c.band.in_(SPAM_BANDS), corrections.c.kind == FALSE_POSITIVE), 1), else_=0)
    fn = case((and_(v.c.band == "ham", corrections.c.kind == FALSE_NEGATIVE), 1), else_=0)
    return func.coalesce(func.sum(fp), 0), func.coalesce(func.sum(fn), 0)


def misfiling_rates(engine: Engine, window: float, now: float | None = None) -> MisfilingRates:
    """False-positive and false-negative figures for arrivals in ``(now - window, now]``."""
    end = time.time() if now is None else now
    start = end - window
    v = schema.verdict
    corrections = _corrections(end)
    fp, fn = _misfiling_columns(corrections)
    with _reading(engine) as conn:
        judged = conn.execute(
            select(func.count()).where(_trailing(start, end), v.c.band.in_(JUDGED_BANDS))
        ).scalar_one()
        wrong = conn.execute(
            select(fp, fn)
            .select_from(v.join(corrections, corrections.c.tracking_id == v.c.tracking_id))
            .where(_trailing(start, end))
        ).one()
    return MisfilingRates(start, end, int(judged), int(wrong[0]), int(wrong[1]))


def _day_bounds(days: int, now: float) -> tuple[float, float, dt.date]:
    today = dt.datetime.fromtimestamp(now, dt.UTC).date()
    first = today - dt.timedelta(days=days - 1)
    start = dt.datetime(first.year, first.month, first.day, tzinfo=dt.UTC).timestamp()
    return start, start + days * DAY, first


def daily_report(engine: Engine, days: int = 14, now: float | None = None) -> list[DayReport]:
    """The last *days* UTC days, oldest first, today (so far) last; empty days included."""
    now = time.time() if now is None else now
    start, end, first = _day_bounds(days, now)
    v = schema.verdict
    day = _floor((v.c.received_at - start) / DAY).label("day")
    corrections = _corrections(now)
    fp, fn = _misfiling_columns(corrections)
    with _reading(engine) as conn:
        bands = conn.execute(
            select(day, v.c.band, func.count()).where(_days(start, end)).group_by(day, v.c.band)
        ).all()
        wrong = conn.execute(
            select(day, fp, fn)
            .select_from(v.join(corrections, corrections.c.tracking_id == v.c.tracking_id))
            .where(_days(start, end))
            .group_by(day)
        ).all()
    by_band: list[dict[str, int]] = [{band: 0 for band in ALL_BANDS} for _ in range(days)]
    for index, band, count in bands:
        by_band[int(index)][band] = by_band[int(index)].get(band, 0) + int(count)
    misfiled = {int(index): (int(a), int(b)) for index, a, b in wrong}
    return [
        DayReport(first + dt.timedelta(days=i), by_band[i], *misfiled.get(i, (0, 0)))
        for i in range(days)
    ]


def score_histogram(
    engine: Engine, days: int = 14, now: float | None = None, bins: int = HISTOGRAM_BINS
) -> ScoreHistogram:
    """Scores of messages that arrived in the last *days* UTC days, in *bins* equal bins."""
    now = time.time() if now is None else now
    start, end, _ = _day_bounds(days, now)
    v = schema.verdict
    edges = tuple(i / bins for i in range(bins + 1))
    # One pass: the number of scores below each inner edge, then differences.  Portable,
    # unlike bucketing with CAST (which rounds on PostgreSQL) or WIDTH_BUCKET (no SQLite).
    below = [func.coalesce(func.sum(case((v.c.score < e, 1), else_=0)), 0) for e in edges[1:-1]]
    with _reading(engine) as conn:
        row = conn.execute(
            select(func.count(v.c.score), *below).where(_days(start, end), v.c.score.is_not(None))
        ).one()
    total, cumulative = int(row[0]), [0, *(int(x) for x in row[1:])]
    cumulative.append(total)
    counts = tuple(cumulative[i + 1] - cumulative[i] for i in range(bins))
    return ScoreHistogram(edges, counts)


def model_summary(engine: Engine, tokens: int | None = None) -> ModelSummary:
    """Model size, class totals and the time of the newest ledger entry.

    *tokens*: the model's size when the caller knows it (``ModelStore.vocabulary().size``,
    kept in memory across its own training).  None counts the token table, which reads every
    row: seconds for tens of millions, too much for a gauge refreshed every minute."""
    t, c, ledger = schema.token, schema.class_total, schema.ledger
    with _reading(engine) as conn:
        if tokens is None:
            tokens = conn.execute(
                select(func.count()).where((t.c.ham > 0) | (t.c.spam > 0))
            ).scalar_one()
        totals = {int(k): int(v) for k, v in conn.execute(select(c.c.label, c.c.messages))}
        last = conn.execute(select(func.max(ledger.c.trained_at))).scalar_one()
    return ModelSummary(
        int(tokens),
        int(totals.get(0, 0)),
        int(totals.get(1, 0)),
        None if last is None else float(last),
    )


def ping(engine: Engine) -> bool:
    """True when the database answers a trivial query (for the readiness check)."""
    with _reading(engine) as conn:
        return conn.execute(select(1)).scalar_one() == 1

"""The status page: what the filter did lately, for admins without a monitoring stack.

One server-rendered HTML document: messages per day by band (stacked bars), the daily
false-positive and false-negative rates (lines), the score distribution with the cut-offs
marked, the current mode, cut-offs and actions, the model's size and its last training.
Charts are inline SVG; there are no scripts, style sheets, fonts or images from anywhere, so
the page works offline and passes a ``default-src 'none'`` content security policy.  It
scales to a phone's width (viewport meta, fluid SVG).

Every value placed in the page goes through :func:`html`, which escapes anything not already
:class:`Markup`.  The store is read by ``store/reports.py`` in a worker thread, so rendering
never blocks the event loop on SQL.
"""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import logging
import math
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from html import escape
from typing import Final

from sqlalchemy import Engine

from mailweir.daemon.bar_charts import BarSeries, category_line_chart, stacked_bar_chart
from mailweir.daemon.metrics import RATE_WINDOWS
from mailweir.daemon.preload import MemoryState
from mailweir.daemon.settings import PolicySettings
from mailweir.store import reports
from mailweir.store.reports import DayReport, MisfilingRates, ModelSummary, ScoreHistogram

log = logging.getLogger("mailweir.status_page")

DAYS: Final = 14
BAND_COLOURS: Final = {
    "ham": "#1a7f37",
    "suspect": "#bf8700",
    "spam": "#d1242f",
    "unjudged": "#8c959f",
    "failed": "#8250df",
    "listed": "#0969da",  # decided by a sender list of the site policy, not scored
}
FP_COLOUR, FN_COLOUR = "#d1242f", "#1f6feb"


class Markup(str):
    """Text that is already HTML; :func:`html` inserts it as it is."""


def html(template: str, **values: object) -> Markup:
    """Fill ``{name}`` fields of *template*, escaping every value that is not Markup."""
    safe = {k: v if isinstance(v, Markup) else escape(str(v)) for k, v in values.items()}
    return Markup(template.format(**safe))


def join(parts: Iterable[Markup]) -> Markup:
    return Markup("".join(parts))


@dataclass(frozen=True)
class StatusData:
    generated_at: float
    policy: PolicySettings
    days: list[DayReport] = field(default_factory=list)
    histogram: ScoreHistogram | None = None
    model: ModelSummary | None = None
    rates: dict[str, MisfilingRates] = field(default_factory=dict)
    error: str | None = None
    memory: MemoryState | None = None  # what memory holds of the model (daemon/preload.py)


def collect(
    engine: Engine,
    policy: PolicySettings,
    now: float,
    days: int = DAYS,
    model_tokens: Callable[[], int] | None = None,
    memory: Callable[[], MemoryState] | None = None,
) -> StatusData:
    """Every figure the page shows (blocking: run it in a worker thread).  *model_tokens*
    gives the model's size from memory; without it the token table is counted.  *memory*
    says what memory holds of the model (left out when not given)."""
    return StatusData(
        generated_at=now,
        policy=policy,
        days=reports.daily_report(engine, days, now),
        histogram=reports.score_histogram(engine, days, now),
        model=reports.model_summary(engine, None if model_tokens is None else model_tokens()),
        rates={w: reports.misfiling_rates(engine, s, now) for w, s in RATE_WINDOWS.items()},
        memory=None if memory is None else memory(),
    )


class StatusPage:
    """Renders the page from the store; ``policy`` is read per request so a reload shows.

    The store's figures are kept for ``max_age`` seconds and requests arriving meanwhile
    share one read, so a page left reloading (or many admins at once) cost the database
    one set of queries per period.
    """

    def __init__(
        self,
        engine: Engine,
        policy: Callable[[], PolicySettings],
        *,
        days: int = DAYS,
        max_age: float = 10.0,
        clock: Callable[[], float] = time.time,
        model_tokens: Callable[[], int] | None = None,
        memory: Callable[[], MemoryState] | None = None,
    ) -> None:
        self._engine = engine
        self._model_tokens = model_tokens
        self._memory = memory
        self._policy = policy
        self._days = days
        self._max_age = max_age
        self._clock = clock
        self._lock = asyncio.Lock()
        self._cached: StatusData | None = None
        self.reads = 0  # store reads so far (tests, and a hint when tuning max_age)

    async def render(self) -> str:
        async with self._lock:
            now = self._clock()
            data = self._cached
            if data is None or now - data.generated_at >= self._max_age or data.error:
                data = await self._read(now)
                self._cached = data
        # The policy is cheap and may have been reloaded: always the current one.
        return render_page(dataclasses.replace(data, policy=self._policy()))

    async def _read(self, now: float) -> StatusData:
        self.reads += 1
        policy = self._policy()
        try:
            return await asyncio.to_thread(
                collect, self._engine, policy, now, self._days, self._model_tokens, self._memory
            )
        except Exception as exc:
            log.exception("status page: reading the store failed")
            return StatusData(now, policy, error=f"{type(exc).__name__}: {exc}")


# -- formatting ------------------------------------------------------------------------------


def percent(rate: float) -> str:
    return "–" if math.isnan(rate) else f"{rate * 100:.2f} %"


def utc(timestamp: float) -> str:
    return dt.datetime.fromtimestamp(timestamp, dt.UTC).strftime("%Y-%m-%d %H:%M UTC")


def ago(seconds: float) -> str:
    for unit, size in (("day", 86400), ("hour", 3600), ("minute", 60)):
        if seconds >= size:
            n = int(seconds // size)
            return f"{n} {unit}{'s' if n != 1 else ''} ago"
    return "just now"


# -- the page --------------------------------------------------------------------------------

STYLE: Final = """
:root { color-scheme: light; }
* { box-sizing: border-box; }
body { margin: 0; font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       color: #1f2328; background: #f6f8fa; line-height: 1.45; }
header, main, footer { max-width: 1040px; margin: 0 auto; padding: 12px 16px; }
h1 { font-size: 1.4rem; margin: 8px 0 2px; }
h2 { font-size: 1rem; margin: 0 0 6px; color: #57606a; font-weight: 600; }
.muted { color: #57606a; font-size: 0.9rem; margin: 0; }
.cards { display: grid; gap: 12px;
         grid-template-columns: repeat(auto-fit, minmax(min(100%, 300px), 1fr)); }
.card, figure { background: #fff; border: 1px solid #d0d7de; border-radius: 8px;
                padding: 12px; margin: 0; }
.big { font-size: 1.5rem; font-weight: 600; margin: 0; }
.charts { display: grid; gap: 12px; margin-top: 12px;
          grid-template-columns: repeat(auto-fit, minmax(min(100%, 460px), 1fr)); }
figure svg { display: block; width: 100%; height: auto; }
figcaption { font-size: 0.85rem; color: #57606a; margin-top: 6px; }
table { border-collapse: collapse; width: 100%; font-size: 0.9rem; }
th, td { text-align: right; padding: 3px 6px; border-bottom: 1px solid #eaeef2;
         white-space: nowrap; }
th:first-child, td:first-child { text-align: left; }
.table-wrap { overflow-x: auto; }
details { margin-top: 12px; background: #fff; border: 1px solid #d0d7de; border-radius: 8px;
          padding: 8px 12px; }
.warn { background: #fff8c5; border: 1px solid #d4a72c; border-radius: 8px; padding: 8px 12px; }
.error { background: #ffebe9; border: 1px solid #ff8182; border-radius: 8px; padding: 8px 12px; }
dl { display: grid; grid-template-columns: auto 1fr; gap: 2px 10px; margin: 0; }
dt { color: #57606a; } dd { margin: 0; overflow-wrap: anywhere; }
.big + .muted { margin-bottom: 8px; }
@media (max-width: 520px) {
  header, main, footer { padding: 8px; }
  .card, figure { padding: 8px; }
}
"""


def _policy_card(policy: PolicySettings) -> Markup:
    meaning = (
        "observe: scores, logs and counts; never changes or stops a message"
        if policy.mode == "observe"
        else "enforce: the actions below are applied"
    )
    rows = [
        ("spam", f"score ≥ {policy.spam_threshold:g}", policy.spam_action),
        ("suspect", f"score ≥ {policy.suspect_threshold:g}", policy.suspect_action),
        ("ham", f"score < {policy.suspect_threshold:g}", policy.ham_action),
    ]
    extra = [html("<dt>position</dt><dd>{v}</dd>", v=policy.position)]
    if policy.subject_prefix:
        extra.append(html("<dt>subject prefix</dt><dd>{v}</dd>", v=policy.subject_prefix))
    if policy.quarantine_mailbox:
        extra.append(html("<dt>quarantine</dt><dd>{v}</dd>", v=policy.quarantine_mailbox))
    return html(
        '<div class="card"><h2>Mode and cut-offs</h2><p class="big">{mode}</p>'
        '<p class="muted">{meaning}</p><dl>{rows}{extra}</dl></div>',
        mode=policy.mode,
        meaning=meaning,
        rows=join(html("<dt>{b}</dt><dd>{r} → {a}</dd>", b=b, r=r, a=a) for b, r, a in rows),
        extra=join(extra),
    )


# What memory holds of the model, as the page words it (daemon/preload.py memory_state).
MEMORY_WORDS: dict[MemoryState, str] = {
    "counts": "all token counts",
    "presence": "which tokens it holds (larger than model.cache_tokens)",
    "none": "counts as mail needs them",
}


def _model_card(
    model: ModelSummary | None, policy: PolicySettings, now: float, memory: MemoryState | None
) -> Markup:
    if model is None:
        return html('<div class="card"><h2>Model</h2><p class="muted">unavailable</p></div>')
    last = (
        "never"
        if model.last_trained_at is None
        else f"{utc(model.last_trained_at)} ({ago(now - model.last_trained_at)})"
    )
    guard = Markup("")
    if min(model.ham_messages, model.spam_messages) < max(policy.min_trained, 1):
        guard = html(
            '<p class="warn">Cold start: verdicts act once each class has {n} trained '
            "messages; until then messages are marked as not yet judged.</p>",
            n=policy.min_trained,
        )
    return html(
        '<div class="card"><h2>Model</h2><dl><dt>tokens</dt><dd>{tokens}</dd>'
        "<dt>ham trained</dt><dd>{ham}</dd><dt>spam trained</dt><dd>{spam}</dd>"
        "<dt>last training</dt><dd>{last}</dd>{held}</dl>{guard}</div>",
        tokens=f"{model.tokens:,}",
        ham=f"{model.ham_messages:,}",
        spam=f"{model.spam_messages:,}",
        last=last,
        held=(
            html("<dt>in memory</dt><dd>{words}</dd>", words=MEMORY_WORDS[memory])
            if memory is not None
            else Markup("")
        ),
        guard=guard,
    )


def _rates_card(rates: dict[str, MisfilingRates]) -> Markup:
    rows = join(
        html(
            "<tr><td>{w}</td><td>{judged}</td><td>{fp} ({fpr})</td><td>{fn} ({fnr})</td></tr>",
            w=window,
            judged=f"{r.judged:,}",
            fp=r.false_positives,
            fpr=percent(r.false_positive_rate),
            fn=r.false_negatives,
            fnr=percent(r.false_negative_rate),
        )
        for window, r in rates.items()
    )
    return html(
        '<div class="card"><h2>Misfiling</h2><div class="table-wrap"><table><thead><tr>'
        "<th>last</th><th>judged</th><th>false pos.</th><th>false neg.</th></tr></thead>"
        "<tbody>{rows}</tbody></table></div></div>",
        rows=rows,
    )


def _day_label(day: dt.date) -> str:
    return day.strftime("%m-%d")


def _charts(data: StatusData) -> Markup:
    if not data.days:
        return Markup("")
    labels = [_day_label(d.day) for d in data.days]
    today = dt.datetime.fromtimestamp(data.generated_at, dt.UTC).date()
    if data.days[-1].day == today:
        labels[-1] = "today"  # a partial day: its bar is short and its rates are young
    bands = [
        BarSeries(band, [float(d.by_band.get(band, 0)) for d in data.days], colour)
        for band, colour in BAND_COLOURS.items()
        if band in ("ham", "suspect", "spam") or any(d.by_band.get(band) for d in data.days)
    ]
    volume = stacked_bar_chart(
        labels, bands, title="Messages per day", x_label="day (UTC)", y_label="messages"
    )
    misfiling = category_line_chart(
        labels,
        [
            BarSeries("false positives", [d.false_positive_rate for d in data.days], FP_COLOUR),
            BarSeries("false negatives", [d.false_negative_rate for d in data.days], FN_COLOUR),
        ],
        title="Misfiling rate per day",
        x_label="day the message arrived (UTC)",
        y_label="share of judged",
        fmt=lambda v: f"{v * 100:g}%",
        y_min_top=0.01,
    )
    figures = [
        html('<figure id="volume">{svg}</figure>', svg=Markup(volume)),
        html(
            '<figure id="misfiling">{svg}<figcaption>Corrections count toward the day their '
            "message arrived, "
            "so recent days read low until users have reported.</figcaption></figure>",
            svg=Markup(misfiling),
        ),
    ]
    if data.histogram is not None:
        figures.append(_histogram_figure(data.histogram, data.policy, len(data.days)))
    return html('<section class="charts">{figures}</section>', figures=join(figures))


def _histogram_figure(hist: ScoreHistogram, policy: PolicySettings, days: int) -> Markup:
    bins = [f"{a:.2f}–{b:.2f}" for a, b in zip(hist.edges, hist.edges[1:], strict=False)]
    svg = stacked_bar_chart(
        bins,
        [BarSeries("messages", [float(c) for c in hist.counts], "#1f6feb")],
        title="Score distribution",
        x_label="spam probability",
        y_label="messages",
        markers=[
            (policy.suspect_threshold, f"suspect {policy.suspect_threshold:g}"),
            (policy.spam_threshold, f"spam {policy.spam_threshold:g}"),
        ],
        x_ticks=[(x, f"{x:g}") for x in (0.0, 0.25, 0.5, 0.75, 1.0)],
    )
    return html(
        '<figure id="scores">{svg}<figcaption>{n} scored messages in the last {days} days; '
        "dashed lines "
        "are the cut-offs.</figcaption></figure>",
        svg=Markup(svg),
        n=f"{sum(hist.counts):,}",
        days=days,
    )


def _daily_table(days: list[DayReport]) -> Markup:
    if not days:
        return Markup("")
    head = "".join(f"<th>{escape(b)}</th>" for b in BAND_COLOURS)
    rows = join(
        html(
            "<tr><td>{day}</td>{cells}<td>{fp}</td><td>{fn}</td></tr>",
            day=d.day.isoformat(),
            cells=join(html("<td>{n}</td>", n=d.by_band.get(b, 0)) for b in BAND_COLOURS),
            fp=percent(d.false_positive_rate),
            fn=percent(d.false_negative_rate),
        )
        for d in reversed(days)
    )
    return html(
        '<details><summary>Daily figures</summary><div class="table-wrap"><table><thead><tr>'
        "<th>day (UTC)</th>{head}<th>false pos.</th><th>false neg.</th></tr></thead>"
        "<tbody>{rows}</tbody></table></div></details>",
        head=Markup(head),
        rows=rows,
    )


def render_page(data: StatusData) -> str:
    """The whole HTML document."""
    error = (
        html('<p class="error">Reports unavailable: {e}</p>', e=data.error)
        if data.error
        else Markup("")
    )
    cards = [_policy_card(data.policy)]
    if data.error is None:
        model = _model_card(data.model, data.policy, data.generated_at, data.memory)
        cards += [model, _rates_card(data.rates)]
    return html(
        '<!doctype html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        "<title>mailweir status</title><style>{style}</style></head><body>"
        '<header><h1>mailweir status</h1><p class="muted">{generated} · last {days} days'
        '</p></header><main>{error}<section class="cards">{cards}</section>{charts}{table}'
        '</main><footer><p class="muted">A false positive is a message judged spam or '
        "suspect that a user sent back as wanted mail; a false negative, one judged ham and "
        "sent back as spam. Each rate is over the messages judged (ham, suspect or spam) that "
        "arrived in the period. Metrics for Prometheus: <code>/metrics</code>.</p></footer>"
        "</body></html>\n",
        style=Markup(STYLE),
        generated=utc(data.generated_at),
        days=len(data.days) or DAYS,
        error=error,
        cards=join(cards),
        charts=_charts(data),
        table=_daily_table(data.days),
    )

"""The status page and its category charts, rendered without a browser."""

from __future__ import annotations

import asyncio
import datetime as dt
import math
import threading
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import pytest

from mailweir.daemon import status_page
from mailweir.daemon.bar_charts import (
    BarSeries,
    category_line_chart,
    nice_ceiling,
    stacked_bar_chart,
)
from mailweir.daemon.settings import PolicySettings
from mailweir.daemon.status_page import Markup, StatusData, StatusPage, html, render_page
from mailweir.store import ModelStore, reports
from mailweir.store.engine import make_engine
from mailweir.store.reports import DayReport, MisfilingRates, ModelSummary, ScoreHistogram
from mailweir.store.verdicts import FeedbackChannel, FeedbackKind, FeedbackRecord, VerdictRecord

SVG = "{http://www.w3.org/2000/svg}"
NOW = dt.datetime(2026, 11, 20, 12, tzinfo=dt.UTC).timestamp()
HOSTILE = '<script>alert("x")</script>'


class TagCollector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))


def tags_of(page: str) -> list[tuple[str, dict[str, str | None]]]:
    parser = TagCollector()
    parser.feed(page)
    return parser.tags


def sample_data(policy: PolicySettings | None = None) -> StatusData:
    first = dt.date(2026, 11, 7)
    days = [
        DayReport(
            first + dt.timedelta(days=i),
            {"ham": 40 + i, "suspect": 5, "spam": 20 + 2 * i, "unjudged": 0, "failed": i % 2},
            false_positives=i % 3,
            false_negatives=1,
        )
        for i in range(14)
    ]
    edges = tuple(i / 20 for i in range(21))
    histogram = ScoreHistogram(edges, tuple([300, 20] + [5] * 16 + [30, 400]))
    rates = {
        "24h": MisfilingRates(NOW - 86400, NOW, 90, 2, 1),
        "7d": MisfilingRates(NOW - 7 * 86400, NOW, 600, 9, 7),
    }
    return StatusData(
        generated_at=NOW,
        policy=policy or PolicySettings(),
        days=days,
        histogram=histogram,
        model=ModelSummary(123_456, 800, 700, NOW - 2 * 3600),
        rates=rates,
    )


def test_status_page_has_viewport_title_and_three_charts() -> None:
    page = render_page(sample_data())
    assert page.startswith("<!doctype html>")
    tags = tags_of(page)
    assert ("meta", {"name": "viewport", "content": "width=device-width, initial-scale=1"}) in tags
    assert "<title>mailweir status</title>" in page
    assert sum(1 for tag, _ in tags if tag == "svg") == 3
    assert 'id="volume"' in page and 'id="misfiling"' in page and 'id="scores"' in page


def test_status_page_labels_the_partial_day_today() -> None:
    data = sample_data()  # generated on 2026-11-20, its last day
    assert ">today</text>" in render_page(data) and ">11-18</text>" in render_page(data)
    later = dt.datetime(2026, 11, 21, 9, tzinfo=dt.UTC).timestamp()
    page = render_page(StatusData(later, data.policy, data.days, data.histogram, data.model))
    assert ">today</text>" not in page and ">11-20</text>" in page


def test_status_page_loads_nothing_from_outside() -> None:
    page = render_page(sample_data())
    tags = tags_of(page)
    assert not {tag for tag, _ in tags} & {"script", "link", "img", "iframe", "object"}
    for tag, attrs in tags:
        assert "src" not in attrs and "href" not in attrs, tag
        if tag != "svg":  # the SVG namespace is a name, not a fetch
            assert "http" not in " ".join(v or "" for v in attrs.values())
    assert "@import" not in page and "url(" not in page


def test_status_page_shows_figures() -> None:
    page = render_page(sample_data())
    assert "123,456" in page  # tokens
    assert "2 (2.22 %)" in page  # 24 h false positives: 2 of 90
    assert "9 (1.50 %)" in page  # 7 d: 9 of 600
    assert "score ≥ 0.98 → tag" in page and "score ≥ 0.5 → tag" in page
    assert "2 hours ago" in page
    assert "observe" in page


def test_status_page_escapes_configured_text() -> None:
    policy = PolicySettings(subject_prefix=HOSTILE, quarantine_mailbox="q&a@harbourlane.example")
    page = render_page(sample_data(policy))
    assert HOSTILE not in page
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt;" in page
    assert "q&amp;a@harbourlane.example" in page


def test_status_page_error_still_renders_policy() -> None:
    data = StatusData(NOW, PolicySettings(mode="enforce"), error=f"StoreBusy: {HOSTILE}")
    page = render_page(data)
    assert "Reports unavailable" in page and HOSTILE not in page
    assert "enforce" in page


def test_status_page_cold_start_warning() -> None:
    data = sample_data()
    cold = StatusData(NOW, data.policy, data.days, data.histogram, ModelSummary(10, 3, 60, None))
    page = render_page(cold)
    assert "Cold start" in page and "never" in page
    assert "Cold start" not in render_page(data)


def test_html_helper_escapes_all_but_markup() -> None:
    assert html("<b>{x}</b>{y}", x="<i>", y=Markup("<i>")) == "<b>&lt;i&gt;</b><i>"


# -- with a real store ---------------------------------------------------------------------


@pytest.fixture
def filled_engine(tmp_path: Path):  # type: ignore[no-untyped-def]
    store = ModelStore.open(str(tmp_path / "model.sqlite3"))
    store.record_verdicts(
        [
            VerdictRecord(f"t{i}", NOW - 3600 * i, 1, 900, (i % 10) / 10, band, "tag", None)
            for i, band in enumerate(["spam", "suspect", "ham", "ham"] * 10)
        ]
    )
    store.record_feedback(
        FeedbackRecord(FeedbackKind.FALSE_POSITIVE, FeedbackChannel.MAIL, NOW - 1, "t0")
    )
    yield store.engine
    store.close()


async def test_status_page_render_reads_store_in_a_worker_thread(
    filled_engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    loop_thread = threading.current_thread()
    seen: list[threading.Thread] = []
    original = reports.daily_report

    def spy(*args, **kwargs):  # type: ignore[no-untyped-def]
        seen.append(threading.current_thread())
        return original(*args, **kwargs)

    monkeypatch.setattr(reports, "daily_report", spy)
    page = await StatusPage(filled_engine, PolicySettings, clock=lambda: NOW).render()
    assert seen and seen[0] is not loop_thread
    # One message an hour for 40 hours: those 0-23 hours old are in the 24 h window.
    assert "<td>24h</td><td>24</td><td>1 (4.17 %)</td>" in page
    assert "Reports unavailable" not in page


async def test_status_page_render_shares_one_read_per_period(filled_engine) -> None:
    clock = [NOW]
    policies = [PolicySettings(spam_threshold=0.99)]
    page = StatusPage(filled_engine, lambda: policies[-1], max_age=10, clock=lambda: clock[0])
    first = await asyncio.gather(*(page.render() for _ in range(5)))
    assert page.reads == 1 and len(set(first)) == 1
    policies.append(PolicySettings(spam_threshold=0.95))  # a reload shows at once
    clock[0] += 5
    assert "score ≥ 0.95 → tag" in await page.render()
    assert page.reads == 1
    clock[0] += 5
    await page.render()
    assert page.reads == 2


async def test_status_page_render_survives_a_broken_store(tmp_path: Path) -> None:
    engine = make_engine(str(tmp_path / "empty.sqlite3"))  # never migrated: no tables
    page = await StatusPage(engine, PolicySettings, clock=lambda: NOW).render()
    engine.dispose()
    assert "Reports unavailable" in page
    assert "Mode and cut-offs" in page


async def test_status_page_render_does_not_block_other_tasks(
    filled_engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    release = threading.Event()
    original = status_page.collect

    def slow_collect(*args, **kwargs):  # type: ignore[no-untyped-def]
        release.wait(10)
        return original(*args, **kwargs)

    monkeypatch.setattr(status_page, "collect", slow_collect)
    rendering = asyncio.create_task(StatusPage(filled_engine, PolicySettings).render())
    await asyncio.sleep(0)  # the loop keeps running while the worker waits
    assert not rendering.done()
    release.set()
    assert "mailweir status" in await rendering


# -- charts ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "expected"),
    [(0, 1.0), (-3, 1.0), (math.nan, 1.0), (0.7, 1.0), (1, 1.0), (1.01, 2.0), (3, 5.0),
     (7, 10.0), (240, 500.0), (1000, 1000.0), (0.013, 0.02), (0.0667, 0.1)],
)  # fmt: skip
def test_nice_ceiling(value: float, expected: float) -> None:
    assert nice_ceiling(value) == pytest.approx(expected)


def bars(svg: str) -> list[ET.Element]:
    return [e for e in ET.fromstring(svg).iter(f"{SVG}rect") if e.get("class") == "bar"]


def test_stacked_bars_heights_add_up() -> None:
    svg = stacked_bar_chart(
        ["a", "b", "c"],
        [BarSeries("ham", [3, 0, 1], "#00aa00"), BarSeries("spam", [1, 2, 0], "#aa0000")],
        title="t",
        x_label="x",
        y_label="y",
    )
    found = bars(svg)
    assert len(found) == 4  # zero values draw nothing
    heights = [float(e.get("height", 0)) for e in found]
    # y axis runs to nice_ceiling(4) = 5: a bar of 3 is 3/5 of the plot height.
    plot_h = heights[0] / 3 * 5
    assert heights == pytest.approx(
        [3 / 5 * plot_h, 1 / 5 * plot_h, 2 / 5 * plot_h, 1 / 5 * plot_h]
    )
    # the spam layer of "a" sits directly on the ham layer
    ham_a, spam_a = found[0], found[1]
    assert float(spam_a.get("y", 0)) + float(spam_a.get("height", 0)) == pytest.approx(
        float(ham_a.get("y", 0)), abs=0.11
    )


def test_stacked_bars_escape_labels() -> None:
    svg = stacked_bar_chart(
        ["<d>"], [BarSeries("a&b", [1], "#000")], title=HOSTILE, x_label="x", y_label="y"
    )
    ET.fromstring(svg)  # still well-formed XML
    assert HOSTILE not in svg


def test_line_chart_leaves_gaps_for_nan() -> None:
    svg = category_line_chart(
        ["1", "2", "3", "4", "5"],
        [BarSeries("fp", [0.1, 0.2, math.nan, 0.1, 0.3], "#f00")],
        title="t",
        x_label="x",
        y_label="y",
    )
    root = ET.fromstring(svg)
    assert len(list(root.iter(f"{SVG}polyline"))) == 2
    assert len(list(root.iter(f"{SVG}circle"))) == 4
    assert "nan" not in svg.lower()


async def test_status_page_says_what_memory_holds_of_the_model(filled_engine) -> None:
    for state, words in (
        ("counts", "all token counts"),
        ("presence", "which tokens it holds (larger than model.cache_tokens)"),
        ("none", "counts as mail needs them"),
    ):
        page = await StatusPage(
            filled_engine, PolicySettings, clock=lambda: NOW, memory=lambda s=state: s
        ).render()
        assert f"<dt>in memory</dt><dd>{words}</dd>" in page
    page = await StatusPage(filled_engine, PolicySettings, clock=lambda: NOW).render()
    assert "in memory" not in page  # not told: not shown

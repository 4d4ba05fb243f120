"""Charts over a category axis (days, score bins) for the status page: stacked bars and lines.

Same conventions as ``charts.py``: a self-contained SVG string with a ``viewBox`` (so CSS can
scale it to any width), no scripts, every text escaped, and a ``<title>`` on each bar or point
so a pointer or a screen reader gets the exact figure.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from html import escape

from mailweir.daemon.charts import HEIGHT, MARGIN_BOTTOM, MARGIN_LEFT, MARGIN_RIGHT, WIDTH

MARGIN_TOP = 52  # room for the title and a legend row
MAX_X_LABELS = 8  # more would overlap at 14 px on a 480-unit-wide chart


@dataclass(frozen=True)
class BarSeries:
    """One stacked layer (or one line): a value per category; NaN means "no data"."""

    label: str
    values: Sequence[float]
    colour: str


def nice_ceiling(value: float) -> float:
    """The smallest 1, 2 or 5 times a power of ten at or above *value* (1 for value <= 0)."""
    if not value > 0 or math.isinf(value):
        return 1.0
    power = 10 ** math.floor(math.log10(value))
    for step in (1, 2, 5, 10):
        if step * power >= value * (1 - 1e-12):
            return float(step * power)
    return float(10 * power)  # unreachable


def _count(value: float) -> str:
    return f"{value:,.0f}" if value == int(value) else f"{value:g}"


@dataclass(frozen=True)
class _Frame:
    n: int
    y_max: float
    plot_w: float = WIDTH - MARGIN_LEFT - MARGIN_RIGHT
    plot_h: float = HEIGHT - MARGIN_TOP - MARGIN_BOTTOM

    @property
    def slot(self) -> float:
        return self.plot_w / max(self.n, 1)

    def x(self, index: float) -> float:
        return float(MARGIN_LEFT) + index * self.slot

    def y(self, value: float) -> float:
        return MARGIN_TOP + self.plot_h - value / self.y_max * self.plot_h


def _open(
    title: str,
    frame: _Frame,
    categories: Sequence[str],
    fmt: Callable[[float], str],
    x_ticks: Sequence[tuple[float, str]] | None = None,
) -> list[str]:
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {WIDTH} {HEIGHT}" '
        f'width="{WIDTH}" height="{HEIGHT}" role="img" aria-label="{escape(title)}" '
        'font-family="sans-serif" font-size="14">',
        f"<title>{escape(title)}</title>",
        f'<rect x="0" y="0" width="{WIDTH}" height="{HEIGHT}" fill="#ffffff"/>',
        f'<text x="{WIDTH / 2}" y="18" text-anchor="middle" font-size="16">{escape(title)}</text>',
    ]
    for i in range(5):
        value = frame.y_max * i / 4
        y = frame.y(value)
        parts.append(
            f'<line x1="{MARGIN_LEFT}" y1="{y:.1f}" x2="{MARGIN_LEFT + frame.plot_w}" '
            f'y2="{y:.1f}" stroke="#e5e5e5"/>'
            f'<text x="{MARGIN_LEFT - 6}" y="{y + 4:.1f}" text-anchor="end">'
            f"{escape(fmt(value))}</text>"
        )
    base = MARGIN_TOP + frame.plot_h
    for fraction, text in x_ticks or ():
        x = MARGIN_LEFT + fraction * frame.plot_w
        parts.append(
            f'<line x1="{x:.1f}" y1="{base}" x2="{x:.1f}" y2="{base + 4}" stroke="#555555"/>'
            f'<text x="{x:.1f}" y="{base + 16}" text-anchor="middle">{escape(text)}</text>'
        )
    every = max(1, math.ceil(len(categories) / MAX_X_LABELS))
    for i, name in enumerate(categories if x_ticks is None else ()):
        # Label every k-th category, counting back from the last (today is always labelled).
        if (len(categories) - 1 - i) % every:
            continue
        parts.append(
            f'<text x="{frame.x(i + 0.5):.1f}" y="{MARGIN_TOP + frame.plot_h + 16}" '
            f'text-anchor="middle">{escape(name)}</text>'
        )
    return parts


def _legend(series: Sequence[BarSeries]) -> str:
    parts, x = [], MARGIN_LEFT
    for item in series:
        parts.append(
            f'<rect x="{x}" y="28" width="10" height="10" fill="{item.colour}"/>'
            f'<text x="{x + 14}" y="37">{escape(item.label)}</text>'
        )
        x += 24 + 7.5 * len(item.label)
    return "".join(parts)


def _close(parts: list[str], frame: _Frame, x_label: str, y_label: str) -> str:
    mid_y = MARGIN_TOP + frame.plot_h / 2
    parts.append(
        f'<line x1="{MARGIN_LEFT}" y1="{MARGIN_TOP + frame.plot_h}" '
        f'x2="{MARGIN_LEFT + frame.plot_w}" y2="{MARGIN_TOP + frame.plot_h}" stroke="#555555"/>'
        f'<text x="{MARGIN_LEFT + frame.plot_w / 2}" y="{HEIGHT - 10}" '
        f'text-anchor="middle">{escape(x_label)}</text>'
        f'<text x="14" y="{mid_y}" text-anchor="middle" '
        f'transform="rotate(-90 14 {mid_y})">{escape(y_label)}</text>'
        "</svg>"
    )
    return "\n".join(parts)


def stacked_bar_chart(
    categories: Sequence[str],
    series: Sequence[BarSeries],
    *,
    title: str,
    x_label: str,
    y_label: str,
    markers: Sequence[tuple[float, str]] = (),
    x_ticks: Sequence[tuple[float, str]] | None = None,
) -> str:
    """Bars per category, one layer per series stacked bottom-up in the given order.

    ``markers`` are dashed vertical lines at a fraction (0 to 1) of the category axis, for
    example the cut-offs over a histogram of scores on [0, 1]; ``x_ticks`` likewise replace
    the category names under the axis with labelled ticks (bin edges rather than bins).
    """
    totals = [sum(s.values[i] for s in series) for i in range(len(categories))]
    frame = _Frame(len(categories), nice_ceiling(max(totals, default=0)))
    parts = _open(title, frame, categories, _count, x_ticks)
    if len(series) > 1:
        parts.append(_legend(series))
    width = frame.slot * 0.8
    for i, name in enumerate(categories):
        base = 0.0
        for item in series:
            value = item.values[i]
            if value <= 0:
                continue
            top, bottom = frame.y(base + value), frame.y(base)
            parts.append(
                f'<rect class="bar" x="{frame.x(i) + frame.slot * 0.1:.1f}" y="{top:.1f}" '
                f'width="{width:.1f}" height="{bottom - top:.1f}" fill="{item.colour}">'
                f"<title>{escape(f'{name}: {_count(value)} {item.label}')}</title></rect>"
            )
            base += value
    for n, (fraction, label) in enumerate(markers):
        x = MARGIN_LEFT + fraction * frame.plot_w
        parts.append(
            f'<line x1="{x:.1f}" y1="{MARGIN_TOP}" x2="{x:.1f}" y2="{MARGIN_TOP + frame.plot_h}" '
            'stroke="#333333" stroke-dasharray="4 3"/>'
            f'<text x="{x - 3:.1f}" y="{MARGIN_TOP + 12 + 14 * n}" text-anchor="end" '
            f'font-size="12">{escape(label)}</text>'
        )
    return _close(parts, frame, x_label, y_label)


def category_line_chart(
    categories: Sequence[str],
    series: Sequence[BarSeries],
    *,
    title: str,
    x_label: str,
    y_label: str,
    fmt: Callable[[float], str] = _count,
    y_min_top: float = 0.0,
) -> str:
    """One line per series over the categories; NaN values leave a gap in the line.

    The y axis runs from 0 to a round number at or above the largest value and *y_min_top*.
    """
    finite = [v for s in series for v in s.values if math.isfinite(v)]
    frame = _Frame(len(categories), nice_ceiling(max([*finite, y_min_top], default=0)))
    parts = _open(title, frame, categories, fmt)
    parts.append(_legend(series))
    points = []  # drawn after every line, so no line hides a point's tooltip
    for item in series:
        runs: list[list[str]] = [[]]
        for i, value in enumerate(item.values):
            if not math.isfinite(value):
                runs.append([])
                continue
            x, y = frame.x(i + 0.5), frame.y(value)
            runs[-1].append(f"{x:.1f},{y:.1f}")
            points.append(
                f'<circle class="point" cx="{x:.1f}" cy="{y:.1f}" r="3" fill="{item.colour}">'
                f"<title>{escape(f'{categories[i]}: {item.label} {fmt(value)}')}</title></circle>"
            )
        parts.extend(
            f'<polyline points="{" ".join(run)}" fill="none" '
            f'stroke="{item.colour}" stroke-width="2"/>'
            for run in runs
            if len(run) > 1
        )
    parts.extend(points)
    return _close(parts, frame, x_label, y_label)

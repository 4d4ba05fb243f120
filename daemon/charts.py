"""Small, dependency-free SVG charts: the replay's ROC curve and the status page's plots.

Output is a self-contained SVG document (no scripts, no external assets) so it opens in any
browser and can be inlined into HTML.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from html import escape

import numpy as np

WIDTH, HEIGHT = 480, 360
MARGIN_LEFT, MARGIN_RIGHT, MARGIN_TOP, MARGIN_BOTTOM = 56, 16, 32, 48
PALETTE = ("#1f6feb", "#d1242f", "#1a7f37", "#9a6700", "#8250df")
MAX_POINTS = 2000  # a ROC of 10,000 messages has ~10,000 corners; the eye needs far fewer


@dataclass(frozen=True)
class Series:
    label: str
    x: Sequence[float]
    y: Sequence[float]


def _thin(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if len(x) <= MAX_POINTS:
        return x, y
    keep = np.unique(np.linspace(0, len(x) - 1, MAX_POINTS).astype(int))
    return x[keep], y[keep]


def line_chart(
    series: Sequence[Series],
    *,
    title: str,
    x_label: str,
    y_label: str,
    x_range: tuple[float, float] = (0.0, 1.0),
    y_range: tuple[float, float] = (0.0, 1.0),
    diagonal: bool = False,
) -> str:
    """Render line series as an SVG document string."""
    plot_w = WIDTH - MARGIN_LEFT - MARGIN_RIGHT
    plot_h = HEIGHT - MARGIN_TOP - MARGIN_BOTTOM
    (x0, x1), (y0, y1) = x_range, y_range
    x_span = (x1 - x0) or 1.0
    y_span = (y1 - y0) or 1.0

    def px(x: float) -> float:
        return MARGIN_LEFT + (x - x0) / x_span * plot_w

    def py(y: float) -> float:
        return MARGIN_TOP + plot_h - (y - y0) / y_span * plot_h

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {WIDTH} {HEIGHT}" '
        f'width="{WIDTH}" height="{HEIGHT}" role="img" aria-label="{escape(title)}" '
        'font-family="sans-serif" font-size="12">',
        f"<title>{escape(title)}</title>",
        f'<rect x="0" y="0" width="{WIDTH}" height="{HEIGHT}" fill="#ffffff"/>',
        f'<text x="{WIDTH / 2}" y="20" text-anchor="middle" font-size="14">{escape(title)}</text>',
    ]
    for i in range(6):
        fx, fy = x0 + x_span * i / 5, y0 + y_span * i / 5
        parts.append(
            f'<line x1="{px(fx):.1f}" y1="{MARGIN_TOP}" x2="{px(fx):.1f}" '
            f'y2="{MARGIN_TOP + plot_h}" stroke="#e5e5e5"/>'
            f'<text x="{px(fx):.1f}" y="{MARGIN_TOP + plot_h + 16}" '
            f'text-anchor="middle">{fx:g}</text>'
            f'<line x1="{MARGIN_LEFT}" y1="{py(fy):.1f}" x2="{MARGIN_LEFT + plot_w}" '
            f'y2="{py(fy):.1f}" stroke="#e5e5e5"/>'
            f'<text x="{MARGIN_LEFT - 6}" y="{py(fy) + 4:.1f}" text-anchor="end">{fy:g}</text>'
        )
    parts.append(
        f'<rect x="{MARGIN_LEFT}" y="{MARGIN_TOP}" width="{plot_w}" height="{plot_h}" '
        'fill="none" stroke="#555555"/>'
    )
    if diagonal:
        parts.append(
            f'<line x1="{px(x0):.1f}" y1="{py(y0):.1f}" x2="{px(x1):.1f}" y2="{py(y1):.1f}" '
            'stroke="#999999" stroke-dasharray="4 4"/>'
        )
    for n, item in enumerate(series):
        xs, ys = _thin(np.asarray(item.x, dtype=float), np.asarray(item.y, dtype=float))
        points = " ".join(f"{px(a):.1f},{py(b):.1f}" for a, b in zip(xs, ys, strict=True))
        colour = PALETTE[n % len(PALETTE)]
        parts.append(
            f'<polyline points="{points}" fill="none" stroke="{colour}" stroke-width="2">'
            f"<title>{escape(item.label)}</title></polyline>"
            f'<text x="{MARGIN_LEFT + plot_w - 8}" y="{MARGIN_TOP + plot_h - 10 - 16 * n}" '
            f'text-anchor="end" fill="{colour}">{escape(item.label)}</text>'
        )
    parts.append(
        f'<text x="{MARGIN_LEFT + plot_w / 2}" y="{HEIGHT - 10}" '
        f'text-anchor="middle">{escape(x_label)}</text>'
        f'<text x="14" y="{MARGIN_TOP + plot_h / 2}" text-anchor="middle" '
        f'transform="rotate(-90 14 {MARGIN_TOP + plot_h / 2})">{escape(y_label)}</text>'
    )
    parts.append("</svg>")
    return "\n".join(parts)

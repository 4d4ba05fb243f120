"""SVG charts are well-formed, self-contained documents."""

from __future__ import annotations

import xml.etree.ElementTree as ET

from mailweir.daemon.charts import MAX_POINTS, Series, line_chart

SVG = "{http://www.w3.org/2000/svg}"


def test_line_chart_is_well_formed_svg_with_escaped_text() -> None:
    svg = line_chart(
        [Series("fisher <1-AUC>", [0, 0.1, 1], [0, 0.9, 1])],
        title="ROC & friends",
        x_label="fpr",
        y_label="tpr",
        diagonal=True,
    )
    root = ET.fromstring(svg)
    assert root.tag == f"{SVG}svg"
    assert root.find(f"{SVG}title").text == "ROC & friends"  # type: ignore[union-attr]
    lines = root.findall(f"{SVG}polyline")
    assert len(lines) == 1
    assert "http" not in svg.replace("http://www.w3.org/2000/svg", "")  # no external assets


def test_line_chart_thins_long_series() -> None:
    n = 50_000
    svg = line_chart(
        [Series("long", [i / n for i in range(n)], [0.5] * n)], title="t", x_label="x", y_label="y"
    )
    points = ET.fromstring(svg).find(f"{SVG}polyline").get("points")  # type: ignore[union-attr]
    assert len(points.split()) <= MAX_POINTS  # type: ignore[union-attr]

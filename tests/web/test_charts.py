"""The SVG builders: gaps for undefined values, interval bands, one point per defined value.

Each chart is parsed back with the standard library's XML parser (xml.etree), so a chart
that is not well-formed markup fails here before any browser sees it.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

from belated.web import charts, panels
from belated.web.charts import Point


def parse(markup: str) -> ET.Element:
    """The chart as an element tree."""
    return ET.fromstring(str(markup))


def with_class(root: ET.Element, name: str, tag: str | None = None) -> list[ET.Element]:
    """Elements whose class list holds `name` (optionally of one tag)."""
    return [
        e
        for e in root.iter()
        if name in (e.get("class") or "").split() and (tag is None or e.tag == tag)
    ]


def series(
    values: list[float | None], settled: list[bool] | None = None, width: float = 0.1
) -> list[Point]:
    """Points on consecutive days, each with an interval of +-width around its value."""
    settled = settled or [True] * len(values)
    return [
        Point(
            key=f"2026-03-{i + 1:02d}T00:00:00Z",
            label=f"{i + 1:02d} Mar",
            value=v,
            low=None if v is None else max(0.0, v - width),
            high=None if v is None else min(1.0, v + width),
            settled=s,
        )
        for i, (v, s) in enumerate(zip(values, settled, strict=True))
    ]


def test_one_point_per_defined_value_and_a_gap_for_each_undefined_one() -> None:
    values = [0.5, None, 0.7, 0.8, None, 0.6]
    root = parse(charts.line_chart(series(values), title="Precision", chart_id="m-precision"))
    pts = with_class(root, "pt", "circle")
    assert len(pts) == 4
    assert [float(p.get("data-value", "nan")) for p in pts] == [0.5, 0.7, 0.8, 0.6]
    gaps = with_class(root, "gap")
    assert [g.get("data-window") for g in gaps] == ["2026-03-02T00:00:00Z", "2026-03-05T00:00:00Z"]


def test_the_line_never_crosses_a_gap() -> None:
    values = [0.5, None, 0.7, 0.8, None, 0.6]
    root = parse(charts.line_chart(series(values), title="Recall", chart_id="m-recall"))
    segments = with_class(root, "seg")
    # only windows 3 and 4 are neighbours with values on both sides
    assert len(segments) == 1
    pts = with_class(root, "pt", "circle")
    seg = segments[0]
    assert (seg.get("x1"), seg.get("x2")) == (pts[1].get("cx"), pts[2].get("cx"))


def test_undefined_is_not_drawn_as_zero() -> None:
    root = parse(charts.line_chart(series([0.9, None, 0.9]), title="F1", chart_id="f"))
    assert all(p.get("data-value") != "0" for p in with_class(root, "pt"))
    # the axis does not reach down to 0 to make room for a fake zero
    labels = [t.text for t in with_class(root, "ylab")]
    assert "0" not in labels


def test_interval_band_is_drawn_per_run_of_defined_intervals() -> None:
    root = parse(charts.line_chart(series([0.5, 0.6, None, 0.7]), title="P", chart_id="p"))
    band = next(e for e in root.iter() if e.get("class") == "band")
    shapes = list(band)
    # a polygon over the first two windows, a short bar for the lone last one
    assert [s.tag for s in shapes] == ["path", "rect"]
    assert shapes[0].get("d", "").endswith("Z")


def test_no_band_without_intervals() -> None:
    points = [Point(key=str(i), label=str(i), value=0.5) for i in range(3)]
    root = parse(charts.line_chart(points, title="P", chart_id="p"))
    band = next(e for e in root.iter() if e.get("class") == "band")
    assert list(band) == []


def test_higher_values_sit_higher() -> None:
    root = parse(charts.line_chart(series([0.2, 0.9]), title="P", chart_id="p"))
    low, high = with_class(root, "pt")
    assert float(high.get("cy", "0")) < float(low.get("cy", "0"))  # SVG y grows downwards


def test_settled_and_provisional_points_differ_and_provisional_windows_are_hatched() -> None:
    root = parse(
        charts.line_chart(
            series([0.5, 0.6, 0.7, 0.8], [True, True, False, False]), title="P", chart_id="p"
        )
    )
    pts = with_class(root, "pt")
    assert [p.get("data-settled") for p in pts] == ["true", "true", "false", "false"]
    assert [("prov" in (p.get("class") or "")) for p in pts] == [False, False, True, True]
    zone = next(e for e in root.iter() if e.get("class") == "prov-zone")
    assert len(list(zone)) == 1 and list(zone)[0].get("fill") == "url(#p-hatch)"
    assert len(with_class(root, "prov", "line")) == 2  # the dashed segments 2-3 and 3-4


def test_chart_is_an_accessible_image_with_title() -> None:
    root = parse(charts.line_chart(series([0.5]), title="Precision by day", chart_id="m-p"))
    assert root.get("role") == "img"
    assert root.get("aria-label", "").startswith("Precision by day")
    assert root.find("title") is not None and root.find("title").text == "Precision by day"


def test_text_is_escaped() -> None:
    hostile = '<script>alert("x")</script>'
    points = [Point(key=hostile, label=hostile, value=0.5, note=hostile)]
    markup = str(charts.line_chart(points, title=hostile, chart_id=hostile))
    assert "<script>" not in markup
    root = parse(markup)  # still well-formed
    assert root.find("title").text == hostile


def test_empty_series_is_still_a_chart() -> None:
    root = parse(charts.line_chart([], title="Nothing yet", chart_id="e"))
    assert root.get("role") == "img" and with_class(root, "pt") == []


def test_nice_domain_covers_the_values_inside_zero_and_one() -> None:
    lo, hi, ticks = charts.nice_domain([0.61, 0.74, 0.93])
    assert lo <= 0.61 and hi >= 0.93 and 0 <= lo and hi <= 1
    assert ticks[0] >= lo and ticks[-1] <= hi and 2 <= len(ticks) <= 7


def test_bars_count_gaps_hatching_and_reference() -> None:
    values = [1.0, 0.95, None, 0.4]
    points = [Point(key=str(i), label=str(i), value=v, settled=i < 2) for i, v in enumerate(values)]
    root = parse(
        panels.bar_chart(
            points,
            title="Coverage",
            chart_id="cov",
            reference=0.9,
            reference_label="settles at 90%",
        )
    )
    bars = with_class(root, "pt", "rect")
    assert [float(b.get("data-value", "nan")) for b in bars] == [1.0, 0.95, 0.4]
    assert "hatch" in (bars[2].get("style") or "") and bars[0].get("style") is None
    assert len(with_class(root, "gap")) == 1
    ref = next(e for e in root.iter() if e.get("class") == "ref")
    assert ref.find("text").text == "settles at 90%"
    # bar heights are proportional to the shares (the scale starts at 0)
    full, part = float(bars[0].get("height", "0")), float(bars[2].get("height", "0"))
    assert abs(part / full - 0.4) < 1e-3


def test_strip_chart_has_hollow_estimate_markers_only() -> None:
    rows = [
        ("estimated precision", series([0.6, None, 0.7])),
        ("estimated recall", series([0.5, 0.55, None])),
    ]
    root = parse(panels.strip_chart(rows, title="Label-free estimates", chart_id="est"))
    pts = with_class(root, "pt")
    assert len(pts) == 4 and all("est" in (p.get("class") or "") for p in pts)
    assert with_class(root, "seg") == []  # markers, never a line paired with measured values
    assert [r.get("data-row") for r in with_class(root, "row")] == [n for n, _ in rows]


def test_sweep_marks_the_best_threshold() -> None:
    rows = [
        {
            "threshold": k / 100,
            "precision": None if k > 90 else 0.5 + k / 200,
            "recall": 1 - k / 100,
        }
        for k in range(100)
    ]
    root = parse(
        panels.sweep_chart(
            rows,
            title="Sweep",
            chart_id="sweep",
            best=0.42,
            best_label="best F1 at 0.42",
            current=0.5,
        )
    )
    precision = [e for e in root.iter() if e.get("data-series") == "precision"][0]
    recall = [e for e in root.iter() if e.get("data-series") == "recall"][0]
    assert len(with_class(precision, "pt")) == 91 and len(with_class(recall, "pt")) == 100
    marks = {e.get("class"): e.get("data-threshold") for e in with_class(root, "tmark")}
    assert marks == {"tmark best": "0.42", "tmark in-use": "0.5"}

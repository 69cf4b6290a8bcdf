"""Charts of other shapes than a measure along windows: rows of label-free estimates, shares as
bars, and measures against the decision threshold. Built on the primitives of
`belated.web.charts` (numbers in, escaped markup out; no I/O)."""

from __future__ import annotations

from collections.abc import Sequence

from markupsafe import Markup, escape

from belated.web.charts import (
    BOTTOM,
    LEFT,
    RIGHT,
    ROW,
    TOP,
    Frame,
    H,
    Mark,
    Point,
    Reference,
    W,
    attr,
    gap_tick,
    grid,
    hover,
    marks_layer,
    open_svg,
    pct_text,
    reference_lines,
    runs,
    safe_id,
    xlabels,
    xy,
)


def strip_chart(
    rows: Sequence[tuple[str, Sequence[Point]]], *, title: str, chart_id: str, css: str = ""
) -> Markup:
    """Small rows of hollow markers on a fixed 0..1 scale, one row per label-free estimate."""
    cid = safe_id(chart_id)
    n = max((len(pts) for _, pts in rows), default=0)
    height = TOP + ROW * max(len(rows), 1) + BOTTOM
    total = sum(1 for _, pts in rows for p in pts if p.value is not None)
    out = open_svg(
        cid, title, f"{n} windows, {total} estimates, from scores alone", f"strip {css}", height
    )
    fr = Frame(n, 0.0, 1.0, height)
    for r, (name, pts) in enumerate(rows):
        top = TOP + r * ROW
        y0, y1 = top + ROW - 8, top + 26  # the row's 0 and 1

        def ry(v: float, _y0: float = y0, _y1: float = y1) -> float:
            return _y0 - v * (_y0 - _y1)

        out.append(
            f'<g class="row" data-row="{escape(name)}">'
            f'<text x="{LEFT}" y="{xy(top + 14)}" class="rowlab">{escape(name)}</text>'
        )
        for t in (0.0, 0.5, 1.0):
            label = (
                ""
                if t == 0.5
                else (f'<text class="ylab" x="{LEFT - 6}" y="{xy(ry(t))}">{t:g}</text>')
            )
            out.append(
                f'<line class="rule" x1="{LEFT}" x2="{W - RIGHT}" y1="{xy(ry(t))}" '
                f'y2="{xy(ry(t))}"/>{label}'
            )
        for i, p in enumerate(pts):
            if p.value is None:
                continue
            out.append(
                f'<circle class="pt est" cx="{xy(fr.x(i))}" cy="{xy(ry(p.value))}" '
                f'r="3.2" data-value="{attr(p.value)}" data-window="{escape(p.key)}">'
                f"{hover(p, f'{p.value:.3f}')}</circle>"
            )
        out.append("</g>")
    labels = next((pts for _, pts in rows if pts), [])
    out += [xlabels(fr, [p.label for p in labels]), "</svg>"]
    return Markup("".join(out))


def bar_chart(
    points: Sequence[Point],
    *,
    title: str,
    chart_id: str,
    reference: float | None = None,
    reference_label: str = "",
    css: str = "",
    marks: Sequence[Mark] = (),
) -> Markup:
    """Shares in [0, 1] as bars (hatched when provisional), with an optional reference line."""
    cid = safe_id(chart_id)
    fr = Frame(len(points), 0.0, 1.0)
    shown = sum(1 for p in points if p.value is not None)
    out = open_svg(cid, title, f"{len(points)} bars, {shown} with a value", f"bars {css}")
    out.append(grid(fr, [0.0, 0.25, 0.5, 0.75, 1.0], as_pct=True))
    out.append('<g class="pts">')
    width = max(1.0, fr.step * 0.72)
    for i, p in enumerate(points):
        if p.value is None:
            out.append(gap_tick(fr, i, p, "nothing to count"))
            continue
        y = fr.y(min(max(p.value, 0.0), 1.0))
        fill = "" if p.settled else f' style="fill: url(#{cid}-hatch)"'
        cls = "pt bar" if p.settled else "pt bar prov"
        out.append(
            f'<rect class="{cls}"{fill} x="{xy(fr.x(i) - width / 2)}" y="{xy(y)}" '
            f'width="{xy(width)}" height="{xy(H - BOTTOM - y)}" '
            f'data-value="{attr(p.value)}" data-window="{escape(p.key)}">'
            f"{hover(p, pct_text(p.value))}</rect>"
        )
    out.append("</g>")
    if reference is not None:
        out.append(reference_lines(fr, [Reference(reference, reference_label)]))
    out.append(marks_layer(fr, [p.key for p in points], marks))
    out += [xlabels(fr, [p.label for p in points]), "</svg>"]
    return Markup("".join(out))


def _tx(t: float | None) -> float:
    """x of a threshold on the sweep chart."""
    return LEFT + float(t or 0.0) * (W - LEFT - RIGHT)


def sweep_chart(
    rows: Sequence[dict[str, float | None]],
    *,
    title: str,
    chart_id: str,
    best: float | None,
    best_label: str,
    current: float | None = None,
    series: Sequence[str] = ("precision", "recall"),
) -> Markup:
    """Measures against the decision threshold, with the best-F-beta threshold marked."""
    cid = safe_id(chart_id)
    fr = Frame(1, 0.0, 1.0)
    out = open_svg(cid, title, f"{len(rows)} thresholds; {best_label}", "sweep")
    out.append(grid(fr, [0.0, 0.25, 0.5, 0.75, 1.0]))
    for name in series:
        coords: list[tuple[float, float] | None] = []
        for r in rows:
            t, v = r.get("threshold"), r.get(name)
            coords.append(None if t is None or v is None else (_tx(t), fr.y(v)))
        out.append(f'<g class="s-{escape(name)}" data-series="{escape(name)}">')
        for a, b in runs([c is not None for c in coords]):
            d = " L".join(f"{xy(c[0])},{xy(c[1])}" for c in coords[a : b + 1] if c)
            out.append(f'<path class="seg" d="M{d}"/>')
        for r, c in zip(rows, coords, strict=True):
            if c is not None:
                out.append(
                    f'<circle class="pt" cx="{xy(c[0])}" cy="{xy(c[1])}" r="1.7" '
                    f'data-value="{attr(r[name])}" data-threshold="{attr(r["threshold"])}"/>'
                )
        out.append("</g>")
    for value, cls, text, y in (
        (current, "in-use", "in use", H - BOTTOM - 8),
        (best, "best", best_label, TOP + 14),
    ):
        if value is None:
            continue
        xx, right = _tx(value), value > 0.6
        tx, anchor = (xx - 6, "end") if right else (xx + 6, "start")
        out.append(
            f'<g class="tmark {cls}" data-threshold="{attr(value)}"><line x1="{xy(xx)}" '
            f'x2="{xy(xx)}" y1="{TOP}" y2="{H - BOTTOM}"/><text x="{xy(tx)}" y="{y}" '
            f'text-anchor="{anchor}">{escape(text)}</text></g>'
        )
    out.append('<g class="xaxis">')
    for t in (0.0, 0.25, 0.5, 0.75, 1.0):
        out.append(f'<text x="{xy(_tx(t))}" y="{H - BOTTOM + 22}">{t:g}</text>')
    out += ["</g>", "</svg>"]
    return Markup("".join(out))

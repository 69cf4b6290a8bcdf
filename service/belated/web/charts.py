"""Pure SVG builders for the dashboard: numbers in, escaped markup out (no I/O, no web).

Every chart is an <svg role="img"> with a title and one point element (class "pt") per
defined value, carrying its number in data-value. An undefined value (None) is a gap: no
point, no line through it, only a faint mark (class "gap") where it would be.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

from markupsafe import Markup, escape

W, H = 640, 220
LEFT, RIGHT, TOP, BOTTOM = 62, 14, 16, 34
ROW = 76  # height of one row of a strip chart


@dataclass(frozen=True)
class Point:
    """One window of a series; `value` None means undefined (a gap, never zero)."""

    key: str
    label: str
    value: float | None
    low: float | None = None
    high: float | None = None
    settled: bool = True
    note: str = ""
    # an unsettled window drawn at its projected value (what it will read once its labels
    # are in), not its labelled-only value
    projected: bool = False
    # the coverage bounds of an unsettled window (the measure if every missing label went
    # one way or the other): drawn as a lighter band behind the interval
    bounds_low: float | None = None
    bounds_high: float | None = None


@dataclass(frozen=True)
class Mark:
    """Something that happened at a window: an alert's first breach (kind "alert"); other
    kinds (a model's markers) are drawn the same way with their own class."""

    key: str  # the window start the mark sits on
    text: str  # what hovering or focusing the mark says
    kind: str = "alert"
    ref: str = ""  # an id to find it by (data-ref)


def xy(x: float) -> str:
    return f"{x:.1f}"


def attr(x: float | None) -> str:
    return "" if x is None else f"{x:.6g}"


def pct_text(x: float | None) -> str:
    return "none" if x is None else f"{x:.1%}"


def safe_id(text: str) -> str:
    return re.sub(r"[^a-z0-9_-]+", "-", text.lower()).strip("-") or "chart"


def nice_domain(values: Sequence[float]) -> tuple[float, float, list[float]]:
    """A [lo, hi] range with round ticks covering the values, kept inside [0, 1] when they are."""
    if not values:
        return 0.0, 1.0, [0.0, 0.25, 0.5, 0.75, 1.0]
    vmin, vmax = min(values), max(values)
    span = max(vmax - vmin, 0.08)
    steps = (0.02, 0.05, 0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0)
    step = next((s for s in steps if span / s <= 5), 10 ** math.ceil(math.log10(span / 5)))
    lo = math.floor((vmin - step / 4) / step) * step
    hi = math.ceil((vmax + step / 4) / step) * step
    if vmin >= 0:
        lo = max(lo, 0.0)
    if vmax <= 1:
        hi = min(hi, 1.0)
    ticks = [
        round(k * step, 6)
        for k in range(math.ceil(lo / step - 1e-9), math.floor(hi / step + 1e-9) + 1)
    ]
    return round(lo, 6), round(hi, 6), ticks


@dataclass(frozen=True)
class Frame:
    n: int
    lo: float
    hi: float
    height: int = H

    @property
    def step(self) -> float:
        return (W - LEFT - RIGHT) / max(self.n, 1)

    def x(self, i: float) -> float:
        return LEFT + (i + 0.5) * self.step

    def y(self, v: float) -> float:
        return TOP + (self.hi - v) / ((self.hi - self.lo) or 1) * (self.height - TOP - BOTTOM)


def open_svg(cid: str, title: str, summary: str, css: str, height: int = H) -> list[str]:
    label = escape(f"{title}. {summary}")
    return [
        f'<svg class="chart {escape(css)}" id="{cid}" viewBox="0 0 {W} {height}" '
        f'role="img" aria-label="{label}" preserveAspectRatio="xMidYMid meet">',
        f"<title>{escape(title)}</title><desc>{escape(summary)}</desc>",
        f'<defs><pattern id="{cid}-hatch" width="6" height="6" '
        'patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
        '<line x1="0" y1="0" x2="0" y2="6" class="hatch"/></pattern></defs>',
    ]


def grid(fr: Frame, ticks: Sequence[float], as_pct: bool = False) -> str:
    parts = ['<g class="grid">']
    for t in ticks:
        y = xy(fr.y(t))
        text = f"{t:.0%}" if as_pct else f"{t:.2f}".rstrip("0").rstrip(".")
        parts.append(
            f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{y}" y2="{y}"/>'
            f'<text x="{LEFT - 6}" y="{y}" class="ylab">{escape(text)}</text>'
        )
    parts.append("</g>")
    return "".join(parts)


def xlabels(fr: Frame, labels: Sequence[str]) -> str:
    every = max(1, math.ceil(len(labels) / 5))
    y = xy(fr.height - BOTTOM + 22)
    parts = ['<g class="xaxis">']
    for i, text in enumerate(labels):
        if i % every == 0:
            parts.append(f'<text x="{xy(fr.x(i))}" y="{y}">{escape(text)}</text>')
    parts.append("</g>")
    return "".join(parts)


def runs(flags: Sequence[bool]) -> list[tuple[int, int]]:
    """[first, last] index pairs of the consecutive True stretches."""
    out: list[tuple[int, int]] = []
    for i, flag in enumerate(flags):
        if flag and out and out[-1][1] == i - 1:
            out[-1] = (out[-1][0], i)
        elif flag:
            out.append((i, i))
    return out


def zones(fr: Frame, cid: str, unsettled: Sequence[bool]) -> str:
    """Hatched background behind the windows whose measures are still provisional."""
    parts = ['<g class="prov-zone">']
    for a, b in runs(unsettled):
        x0, x1 = fr.x(a) - fr.step / 2, fr.x(b) + fr.step / 2
        parts.append(
            f'<rect x="{xy(x0)}" y="{TOP}" width="{xy(x1 - x0)}" '
            f'height="{fr.height - TOP - BOTTOM}" fill="url(#{cid}-hatch)"/>'
        )
    parts.append("</g>")
    return "".join(parts)


def marks_layer(fr: Frame, keys: Sequence[str], marks: Sequence[Mark]) -> str:
    """A flag above each marked window: a thin dashed stem and a small diamond the reader can
    hover or focus (tabindex) to read what it marks."""
    where = {k: i for i, k in enumerate(keys)}
    parts = ['<g class="marks">']
    for m in marks:
        i = where.get(m.key)
        if i is None:
            continue
        x = fr.x(i)
        y = TOP + 5
        parts.append(
            f'<g class="mark {escape(m.kind)}" tabindex="0" data-kind="{escape(m.kind)}" '
            f'data-window="{escape(m.key)}" data-ref="{escape(m.ref)}" '
            f'aria-label="{escape(m.text)}"><title>{escape(m.text)}</title>'
            f'<line x1="{xy(x)}" x2="{xy(x)}" y1="{xy(y)}" y2="{fr.height - BOTTOM}"/>'
            f'<path d="M{xy(x)},{xy(y - 5)} L{xy(x + 5)},{xy(y)} L{xy(x)},{xy(y + 5)} '
            f'L{xy(x - 5)},{xy(y)} Z"/></g>'
        )
    parts.append("</g>")
    return "".join(parts)


@dataclass(frozen=True)
class Reference:
    """A horizontal line across a chart at `value`, named by `label` (drawn at its right end)."""

    value: float
    label: str


def reference_lines(fr: Frame, references: Sequence[Reference]) -> str:
    """Dashed horizontal lines with their names, for thresholds and reference levels."""
    parts = []
    for r in references:
        y = fr.y(r.value)
        parts.append(
            f'<g class="ref" data-value="{attr(r.value)}"><title>{escape(r.label)}</title>'
            f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{xy(y)}" y2="{xy(y)}"/>'
            f'<text x="{W - RIGHT - 4}" y="{xy(y - 5)}">{escape(r.label)}</text></g>'
        )
    return "".join(parts)


def gap_tick(fr: Frame, i: int, p: Point, text: str) -> str:
    """A short tick on the axis where a window has no value (a gap, never a zero)."""
    x, bottom = xy(fr.x(i)), fr.height - BOTTOM
    return (
        f'<line class="gap" data-window="{escape(p.key)}" x1="{x}" x2="{x}" '
        f'y1="{xy(bottom - 6)}" y2="{xy(bottom)}">{hover(p, text)}</line>'
    )


def hover(p: Point, text: str) -> str:
    state = "settled" if p.settled else "provisional"
    extra = f"; {p.note}" if p.note else ""
    return f"<title>{escape(f'{p.label}: {text} ({state}{extra})')}</title>"


def line_chart(
    points: Sequence[Point],
    *,
    title: str,
    chart_id: str,
    css: str = "",
    marks: Sequence[Mark] = (),
    domain: Sequence[float] | None = None,
    references: Sequence[Reference] = (),
) -> Markup:
    """A measure over windows: a line, its interval as a band, settled points filled,
    provisional points hollow over a hatched zone; None values are gaps. `domain`: values to
    fit the y-axis to (shared by panels of the same measure), else this chart's own.
    `references`: horizontal lines (a rule's threshold, say), always inside the axis."""
    cid = safe_id(chart_id)
    known = [v for p in points for v in (p.value, p.low, p.high) if v is not None]
    known += [r.value for r in references]
    lo, hi, ticks = nice_domain(list(domain) if domain else known)
    fr = Frame(len(points), lo, hi)
    defined = [p for p in points if p.value is not None]
    latest = next((p for p in reversed(points) if p.value is not None), None)
    summary = f"{len(points)} windows, {len(defined)} with a value" + (
        f"; latest {latest.label}: {attr(latest.value)}" if latest else ""
    )
    out = open_svg(cid, title, summary, f"line {css}")
    out += [zones(fr, cid, [not p.settled for p in points]), grid(fr, ticks)]
    out.append('<g class="bounds">')
    for i, p in enumerate(points):
        if p.bounds_low is None or p.bounds_high is None:
            continue
        top = fr.y(min(hi, max(lo, p.bounds_high)))  # clipped to the axis, which they
        bottom = fr.y(min(hi, max(lo, p.bounds_low)))  # do not stretch
        out.append(
            f'<rect x="{xy(fr.x(i) - 5)}" y="{xy(top)}" width="10" '
            f'height="{xy(bottom - top)}" data-window="{escape(p.key)}">'
            f"<title>{escape(f'{p.label}: coverage bounds [{attr(p.bounds_low)}, ')}"
            f"{escape(f'{attr(p.bounds_high)}]')}</title></rect>"
        )
    out.append('</g><g class="band">')
    for a, b in runs([p.low is not None and p.high is not None for p in points]):
        highs = [(fr.x(i), fr.y(points[i].high or 0.0)) for i in range(a, b + 1)]
        lows = [(fr.x(i), fr.y(points[i].low or 0.0)) for i in range(a, b + 1)]
        if a == b:  # a lone window: its interval as a short bar
            out.append(
                f'<rect x="{xy(highs[0][0] - 3)}" y="{xy(highs[0][1])}" width="6" '
                f'height="{xy(lows[0][1] - highs[0][1])}"/>'
            )
            continue
        d = " L".join(f"{xy(px)},{xy(py)}" for px, py in highs + lows[::-1])
        out.append(f'<path d="M{d} Z"/>')
    out.append('</g><g class="trace">')
    for i in range(len(points) - 1):
        p, q = points[i], points[i + 1]
        if p.value is None or q.value is None:
            continue
        cls = "seg" if p.settled and q.settled else "seg prov"
        out.append(
            f'<line class="{cls}" x1="{xy(fr.x(i))}" y1="{xy(fr.y(p.value))}" '
            f'x2="{xy(fr.x(i + 1))}" y2="{xy(fr.y(q.value))}"/>'
        )
    out.append('</g><g class="pts">')
    for i, p in enumerate(points):
        if p.value is None:
            out.append(gap_tick(fr, i, p, "no value"))
            continue
        band = f" [{attr(p.low)}, {attr(p.high)}]" if p.low is not None else ""
        cls = "pt" if p.settled else "pt prov proj" if p.projected else "pt prov"
        shape = (
            f'<rect class="{cls}" x="{xy(fr.x(i) - 3.4)}" y="{xy(fr.y(p.value) - 3.4)}" '
            'width="6.8" height="6.8"'
            if p.projected  # a square: projected, not measured on labels
            else f'<circle class="{cls}" cx="{xy(fr.x(i))}" cy="{xy(fr.y(p.value))}" r="3.6"'
        )
        tag = "rect" if p.projected else "circle"
        out.append(
            f'{shape} data-value="{attr(p.value)}" data-low="{attr(p.low)}" '
            f'data-high="{attr(p.high)}" data-window="{escape(p.key)}" '
            f'data-settled="{str(p.settled).lower()}" '
            f'data-projected="{str(p.projected).lower()}">'
            f"{hover(p, f'{p.value:.3f}{band}')}</{tag}>"
        )
    out.append("</g>")
    out += [reference_lines(fr, references), marks_layer(fr, [p.key for p in points], marks)]
    out.append(xlabels(fr, [p.label for p in points]))
    out.append("</svg>")
    return Markup("".join(out))

"""The drift panels of a binary model's page: score PSI and the change of the predicted
positive rate against the model's reference, window by window, with the thresholds of the
model's shift rules drawn across them.

The values are the `drift` block of /metrics windows (`belated.metrics.drift`). A shift rule
compares each window with its own baseline (trailing windows or a fixed range), not with the
reference, so its threshold line shows how close the scores came to it on the same scale;
the rule's own verdicts are the alert marks.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, tzinfo
from typing import Any

from markupsafe import Markup

from belated.timeutil import parse_ts
from belated.web import charts
from belated.zones import DEFAULT_ZONE, zone


@dataclass(frozen=True)
class Panel:
    """One drift quantity: its key in the window's `drift` block, its title, and the measure
    of the shift rules whose thresholds belong on it."""

    key: str
    title: str
    rule_measure: str
    symmetric: bool  # a change either way counts: draw the threshold above and below zero


PANELS = (
    Panel("score_psi", "Score PSI against the reference", "score_psi", False),
    Panel(
        "positive_rate_change",
        "Predicted positive rate, change from the reference",
        "positive_rate",
        True,
    ),
)


def _against(window: dict[str, Any], tz: tzinfo = UTC) -> str:
    """The period a window's drift is measured against, in the local dates of `tz`."""
    period = (window.get("drift") or {}).get("against") or {}
    if not period.get("start"):
        return ""
    start, end = parse_ts(period["start"]).astimezone(tz), parse_ts(period["end"]).astimezone(tz)
    return f"against the {period.get('kind', 'reference')} {start:%d %b %Y} to {end:%d %b %Y}"


def _points(
    windows: Sequence[dict[str, Any]], key: str, label: Callable[[str], str], tz: tzinfo = UTC
) -> list[charts.Point]:
    out = []
    for w in windows:
        drift = w.get("drift") or {}
        value = drift.get(key)
        note = _against(w, tz) if value is not None else str(drift.get("reason") or "no value")
        out.append(
            charts.Point(
                key=w["start"],
                label=label(w["start"]),
                value=value,
                # drift needs no labels: only the window still open is provisional
                settled=bool(w.get("closed", True)),
                note=note,
            )
        )
    return out


def _references(panel: Panel, rules: Sequence[Any]) -> list[charts.Reference]:
    out: list[charts.Reference] = []
    seen: set[float] = set()
    for r in rules:
        if r.kind != "shift" or r.measure != panel.rule_measure or r.threshold is None:
            continue
        if getattr(r, "retired_at", None) is not None or r.threshold in seen:
            continue
        seen.add(r.threshold)
        per = f" per {r.segment_by}" if getattr(r, "segment_by", None) else ""
        for sign in (1, -1) if panel.symmetric else (1,):
            value = sign * float(r.threshold)
            out.append(charts.Reference(value, f"{r.granularity} rule{per} at {value:g}"))
    if panel.symmetric:
        out.append(charts.Reference(0.0, "reference rate"))
    return out


def drift_panels(
    windows: Sequence[dict[str, Any]],
    rules: Sequence[Any],
    *,
    granularity: str,
    label: Callable[[str], str],
    marks: Sequence[charts.Mark],
    time_zone: str = DEFAULT_ZONE,
) -> list[dict[str, Any]]:
    """The drift panels of a page: each with its key, title, latest value and chart (dates
    in the model's `time_zone`)."""
    out = []
    for panel in PANELS:
        points = _points(windows, panel.key, label, zone(time_zone))
        refs = _references(panel, rules)
        latest = next((p for p in reversed(points) if p.value is not None), None)
        svg: Markup = charts.line_chart(
            points,
            title=f"{panel.title} by {granularity}",
            chart_id=f"drift-{panel.key}",
            css=f"drift d-{panel.key}",
            marks=marks,
            references=refs,
        )
        out.append(
            {
                "key": panel.key,
                "title": panel.title,
                "latest": latest,
                "thresholds": [r.value for r in refs if r.value > 0],
                "svg": svg,
            }
        )
    return out

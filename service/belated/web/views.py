"""What the model page opens on, and the marks its charts carry.

The default daily range runs from the rules' earliest baseline (or the model's first
prediction) to now, at most MAX_DAYS days, and always reaches back to the latest settled
windows; weekly and hourly views start at their first window with data. Alerts are marked at
their first breached window. A model's markers (another part of the service) are meant to be
added to `marks` with kind "marker": the charts draw any kind the same way.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.metrics import params
from belated.store.rollup_tables import Rollup
from belated.store.tables import Marker, ModelRow, Prediction
from belated.timeutil import from_db, parse_ts
from belated.web import charts
from belated.zones import DEFAULT_ZONE, floor_local, is_utc, local_iso, wall_text, zone

MAX_DAYS = 120
SETTLED_SHOWN = 7  # days of settled windows the default range always reaches back to


def first_prediction(session: Session, model: ModelRow) -> datetime | None:
    """When the model's earliest stored prediction was made (None without any); once
    retention dropped raw days, the start of its earliest daily rollup."""
    if model.raw_from_hour is not None:
        day = session.scalar(
            select(func.min(Rollup.start)).where(Rollup.model_id == model.id, Rollup.level == "d")
        )
        if day is not None:
            return datetime.fromtimestamp(int(day) * 3600, UTC)
    first = session.scalar(select(func.min(Prediction.ts)).where(Prediction.model_id == model.id))
    return from_db(first)


def _baseline_start(rule: Any, end: datetime) -> datetime | None:
    base = rule.baseline if isinstance(rule.baseline, dict) else {}
    if base.get("start"):
        return parse_ts(base["start"])
    if base.get("windows"):
        step = params.Range(rule.granularity, end, end).step
        return end - (int(base["windows"]) + 1) * step
    return None


def default_range(
    session: Session, model: ModelRow, granularity: str, rules: list[Any], now: datetime
) -> params.Range:
    """The range a page opens on when the reader chose none (see the module docstring)."""
    name = model.time_zone or DEFAULT_ZONE
    tz = zone(name)
    plain = params.parse_range(granularity, None, None, now, time_zone=name)
    first = first_prediction(session, model)
    if first is None:
        return plain
    first = floor_local(first, granularity, tz)
    if granularity != "day":
        begin = max(plain.start, first)
        return params.Range(granularity, begin, plain.end, name)
    starts = [s for s in (_baseline_start(r, plain.end) for r in rules) if s is not None]
    begin = floor_local(min(starts), "day", tz) if starts else first
    # reach back to the latest settled windows: a window settles at the latest
    # label_delay_days after it closes
    settled_by = plain.end - timedelta(days=model.label_delay_days + SETTLED_SHOWN)
    begin = min(begin, settled_by)
    begin = max(begin, first, plain.end - timedelta(days=MAX_DAYS))
    # a span of whole days counted back across a daylight-saving change ends off midnight
    begin = floor_local(min(begin, plain.end - plain.step), "day", tz)
    return params.Range("day", begin, plain.end, name)


def _when(at: datetime, time_zone: str) -> str:
    """A mark's time: UTC as it always was, or wall time with the offset in a model's zone."""
    if is_utc(time_zone):
        return f"{at:%d %b %Y %H:%M} UTC"
    return wall_text(at, zone(time_zone), "%d %b %Y %H:%M")


def marker_marks(
    found: list[Marker], granularity: str, time_zone: str = DEFAULT_ZONE
) -> list[charts.Mark]:
    """One mark per marker at the window (of the page's granularity, in the model's zone)
    it falls in; its text is the marker's, with its time and who set it."""
    tz = zone(time_zone)
    out = []
    for m in found:
        at = from_db(m.at) or m.at
        out.append(
            charts.Mark(
                key=local_iso(floor_local(at, granularity, tz), tz),
                text=f"marker: {m.text} ({_when(at, time_zone)}, {m.author})",
                kind="marker",
                ref=m.id,
            )
        )
    return out


def alert_marks(
    alerts: list[dict[str, Any]], granularity: str, time_zone: str = DEFAULT_ZONE
) -> list[charts.Mark]:
    """One mark per alert at the window (of the page's granularity, in the model's zone)
    holding its first breach; its text names the alert."""
    tz = zone(time_zone)
    out = []
    for a in alerts:
        breached = [b for b in a.get("breaches") or [] if b.get("breached")]
        if not breached:
            continue
        first = min(parse_ts(b["window_start"]) for b in breached)
        where = f" on {a['segment']}" if a.get("segment") else ""
        text = f"alert {a['state']}{where}: {a.get('description') or a.get('rule_text', '')}"
        out.append(
            charts.Mark(
                key=local_iso(floor_local(first, granularity, tz), tz),
                text=f"{text} (first breach {first.astimezone(tz):%d %b %Y})",
                kind="alert",
                ref=str(a["id"]),
            )
        )
    return out

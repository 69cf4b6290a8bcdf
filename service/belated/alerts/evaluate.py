"""The evaluation job: load windows for each rule, decide, record, move alerts on."""

from __future__ import annotations

import logging
import math
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts import lifecycle
from belated.alerts.decide import Decision, WindowInput, decide, finite, pooled, verdicts
from belated.alerts.schemas import RuleCreate, RuleSettings, settings_from
from belated.alerts.tables import Rule, RuleWindow
from belated.metrics.arrival import Curves
from belated.metrics.load import ensure_fresh, epoch_hour, segment_counts
from belated.metrics.params import Range
from belated.metrics.windows import curves_of, settled_window, to_stats, window_totals
from belated.stats.window import WindowStats
from belated.store import segments
from belated.store.tables import Label, ModelRow
from belated.store.totals import Totals
from belated.timeutil import floor_hour, floor_window, from_db, window_step

log = logging.getLogger(__name__)
MAX_EVALUATED = 120
MIN_EVALUATED = 30  # a first evaluation looks back far enough to catch what history shows
Segment = tuple[str, str] | None  # (tag key, value) of a fanned-out rule, None for all traffic


def settings_of(rule: Rule) -> RuleSettings:
    """A stored rule's effective settings: its JSON row validated again by the API schema.

    The one place a rules-table row becomes settings; evaluation reads nothing else of it.
    """
    fields = {
        **(rule.settings or {}),
        "kind": rule.kind,
        "measure": rule.measure,
        "granularity": rule.granularity,
    }
    return settings_from(RuleCreate.model_validate(fields))


def _span(model: ModelRow, rule: RuleSettings) -> tuple[int, int]:
    """(windows to evaluate, windows of baseline lookback before them)."""
    step_days = window_step(rule.granularity) / timedelta(days=1)
    by_delay = math.ceil((model.label_delay_days + 2) / step_days) + 1
    evaluated = min(MAX_EVALUATED, max(MIN_EVALUATED, by_delay))
    return evaluated, min(MAX_EVALUATED, rule.baseline.windows * 3 + 2)


def _series_range(rule: RuleSettings, now: datetime, evaluated: int) -> Range:
    """The windows a rule evaluates: the last `evaluated` ones up to the current one."""
    step = window_step(rule.granularity)
    end = floor_window(now, rule.granularity) + step
    return Range(rule.granularity, end - evaluated * step, end)


def _baseline_range(rule: RuleSettings) -> Range | None:
    """A fixed baseline's windows (None for a trailing baseline)."""
    b, g = rule.baseline, rule.granularity
    if b.start is None or b.end is None:
        return None
    return Range(g, floor_window(b.start, g), floor_window(b.end, g))


def _window_totals(
    session: Session,
    model: ModelRow,
    rng: Range,
    lookback: int,
    segment: Segment,
    now: datetime,
) -> tuple[list[datetime], list[Totals]]:
    """The totals of each base window of the range, `lookback` windows before it first."""
    return window_totals(session, model, rng, lookback, (segment,) if segment else (), now)


def _series(
    session: Session,
    model: ModelRow,
    rule: RuleSettings,
    segment: Segment,
    now: datetime,
    evaluated: int,
    lookback: int,
    curves: Curves | None,
) -> list[WindowInput]:
    g = rule.granularity
    step = window_step(g)
    rng = _series_range(rule, now, evaluated)
    end = rng.end
    starts, accs = _window_totals(session, model, rng, lookback, segment, now)
    tag_counts: dict[int, dict[str, int]] = {}
    measure = rule.measure or ""
    if measure.startswith("tag_psi:"):
        level = "h" if g == "hour" else "d"
        raw = segment_counts(
            session,
            model,
            key=measure.split(":", 1)[1],
            level=level,
            lo=epoch_hour(starts[0]),
            hi=epoch_hour(end),
        )
        span = int(step / timedelta(hours=1))
        base = epoch_hour(starts[0])
        for start, counts in raw.items():
            i = (start - base) // span
            bucket = tag_counts.setdefault(i, {})
            for k, n in counts.items():
                bucket[k] = bucket.get(k, 0) + n
    return [
        WindowInput(
            start=s,
            end=s + step,
            closed=s + step <= now,
            settled=settled_window(a, s + step, model, now, curves),
            stats=to_stats(a),
            tag_counts=tag_counts.get(i, {}),
        )
        for i, (s, a) in enumerate(zip(starts, accs, strict=True))
    ]


def _fixed_baseline(
    session: Session,
    model: ModelRow,
    rule: RuleSettings,
    now: datetime,
    segment: Segment,
) -> WindowStats | None:
    rng = _baseline_range(rule)
    if rng is None:
        return None
    _, accs = _window_totals(session, model, rng, 0, segment, now)
    return pooled(
        [
            WindowInput(start=rng.start, end=rng.end, closed=True, settled=True, stats=to_stats(a))
            for a in accs
        ]
    )


def evaluate_rule(
    session: Session, rule: Rule, model: ModelRow, now: datetime, max_values: int
) -> dict[str, int]:
    """Evaluate one rule over its segments; record windows; advance its alerts."""
    cfg = settings_of(rule)
    evaluated, lookback = _span(model, cfg)
    # bring the rule's ranges up to date once, here, for every segment below
    series = _series_range(cfg, now, evaluated)
    lo, hi = series.start - lookback * series.step, series.end
    fixed_range = _baseline_range(cfg)
    if fixed_range is not None:
        lo, hi = min(lo, fixed_range.start), max(hi, fixed_range.end)
    ensure_fresh(session, model, epoch_hour(lo), epoch_hour(hi), max_values)
    curves = curves_of(session, model, now)  # settledness by class, for every segment
    segs: list[Segment] = [None]
    if cfg.segment_by:
        admitted = segments.admitted(session=session, model_id=model.id)
        segs = [(cfg.segment_by, v) for v in admitted.get(cfg.segment_by, [])]
    decisions: dict[str, list[Decision]] = {}
    for seg in segs:
        windows = _series(session, model, cfg, seg, now, evaluated, lookback, curves)
        fixed = _fixed_baseline(session, model, cfg, now, seg)
        decisions[f"{seg[0]}:{seg[1]}" if seg else ""] = decide(
            cfg,
            windows,
            lookback,
            fixed_baseline=fixed,
            now=now,
            label_delay_days=model.label_delay_days,
        )
    if cfg.kind == "stall" and cfg.max_silence_hours:
        decisions.setdefault("", []).append(_silence(session, model, cfg.max_silence_hours, now))
    changed = _record(session, rule, decisions, verdicts(decisions, cfg.alpha), now)
    events = 0
    for segment in decisions:
        if lifecycle.advance(session, rule, model, segment, now, cfg.clear_after):
            events += 1
    return {"windows": changed, "events": events}


def _silence(session: Session, model: ModelRow, max_hours: float, now: datetime) -> Decision:
    """No label received for max_silence_hours: one verdict per hour."""
    last = from_db(
        session.scalar(select(func.max(Label.received_at)).where(Label.model_id == model.id))
    )
    hour = floor_hour(now)
    return Decision(
        start=hour,
        end=hour + timedelta(hours=1),
        condition=last is None or (now - last) > timedelta(hours=max_hours),
        value=None if last is None else (now - last) / timedelta(hours=1),
        baseline={"max_silence_hours": max_hours},
    )


def _record(
    session: Session,
    rule: Rule,
    decisions: dict[str, list[Decision]],
    verdicts: dict[tuple[str, datetime], bool],
    now: datetime,
) -> int:
    """Upsert one row per (rule, segment, window); a window changed by late labels is
    updated in place, never counted twice."""
    existing = {
        (r.segment, from_db(r.window_start)): r
        for r in session.scalars(select(RuleWindow).where(RuleWindow.rule_id == rule.id))
    }
    changed = 0
    for seg, ds in decisions.items():
        for d in ds:
            breached = verdicts[(seg, d.start)]
            values = {
                "breached": breached,
                "value": finite(d.value),
                "low": finite(d.low),
                "high": finite(d.high),
                "baseline": _clean(d.baseline),
                "p_value": finite(d.p_value),
                "window_end": d.end,
                "evaluated_at": now,
            }
            row = existing.get((seg, d.start))
            if row is None:
                session.add(
                    RuleWindow(rule_id=rule.id, segment=seg, window_start=d.start, **values)
                )
                changed += 1
            elif row.breached != breached or row.value != values["value"]:
                for k, v in values.items():
                    setattr(row, k, v)
                changed += 1
    session.flush()
    return changed


def _clean(value: Any) -> Any:
    if isinstance(value, float):
        return finite(value)
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    return value

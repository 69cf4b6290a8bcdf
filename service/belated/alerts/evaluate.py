"""The evaluation job: load windows for each rule, decide, record, move alerts on."""

from __future__ import annotations

import logging
import math
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts import lifecycle
from belated.alerts.decide import Decision, WindowInput, decide, finite, pooled
from belated.alerts.schemas import DEFAULTS
from belated.alerts.tables import Rule, RuleWindow
from belated.metrics.load import ensure_fresh, epoch_hour, segment_counts
from belated.metrics.params import Range
from belated.metrics.windows import settled_window, to_stats, window_totals
from belated.stats.change import benjamini_hochberg
from belated.store import segments
from belated.store.tables import Label, ModelRow
from belated.timeutil import floor_hour, floor_window, window_step

log = logging.getLogger(__name__)
MAX_EVALUATED = 120
MIN_EVALUATED = 30  # a first evaluation looks back far enough to catch what history shows


def settings_of(rule: Rule) -> dict[str, Any]:
    """A rule's effective settings (defaults filled in)."""
    return {
        **DEFAULTS,
        **{k: v for k, v in (rule.settings or {}).items() if v is not None},
        "kind": rule.kind,
        "measure": rule.measure,
        "granularity": rule.granularity,
    }


def _span(model: ModelRow, rule: dict[str, Any]) -> tuple[int, int]:
    """(windows to evaluate, windows of baseline lookback before them)."""
    step_days = window_step(rule["granularity"]) / timedelta(days=1)
    by_delay = math.ceil((model.label_delay_days + 2) / step_days) + 1
    evaluated = min(MAX_EVALUATED, max(MIN_EVALUATED, by_delay))
    base = int(rule["baseline"].get("windows") or 7) if isinstance(rule["baseline"], dict) else 7
    return evaluated, min(MAX_EVALUATED, base * 3 + 2)


def _series(
    session: Session,
    model: ModelRow,
    rule: dict[str, Any],
    segment: tuple[str, str] | None,
    now: datetime,
    max_values: int,
    evaluated: int,
    lookback: int,
) -> list[WindowInput]:
    g = rule["granularity"]
    end = floor_window(now, g) + window_step(g)
    rng = Range(g, end - evaluated * window_step(g), end)
    filters = (segment,) if segment else ()
    starts, accs = _fresh_totals(session, model, rng, lookback, filters, now, max_values)
    step = window_step(g)
    tag_counts: dict[int, dict[str, int]] = {}
    measure = rule.get("measure") or ""
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
            s,
            s + step,
            s + step <= now,
            settled_window(a, s + step, model, now),
            to_stats(a),
            tag_counts.get(i, {}),
        )
        for i, (s, a) in enumerate(zip(starts, accs, strict=True))
    ]


def _fresh_totals(
    session: Session,
    model: ModelRow,
    rng: Range,
    lookback: int,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    max_values: int,
) -> Any:
    lo, hi = epoch_hour(rng.start - lookback * rng.step), epoch_hour(rng.end)
    ensure_fresh(session, model, lo, hi, max_values)
    return window_totals(session, model, rng, lookback, filters, now)


def _fixed_baseline(
    session: Session,
    model: ModelRow,
    rule: dict[str, Any],
    now: datetime,
    max_values: int,
    segment: tuple[str, str] | None,
) -> Any:
    b = rule["baseline"]
    if not isinstance(b, dict) or not b.get("start"):
        return None
    from belated.timeutil import parse_ts

    g = rule["granularity"]
    rng = Range(g, floor_window(parse_ts(b["start"]), g), floor_window(parse_ts(b["end"]), g))
    _, accs = _fresh_totals(session, model, rng, 0, (segment,) if segment else (), now, max_values)
    return pooled([WindowInput(rng.start, rng.end, True, True, to_stats(a)) for a in accs])


def evaluate_rule(
    session: Session, rule: Rule, model: ModelRow, now: datetime, max_values: int
) -> dict[str, int]:
    """Evaluate one rule over its segments; record windows; advance its alerts."""
    cfg = settings_of(rule)
    evaluated, lookback = _span(model, cfg)
    if cfg["segment_by"]:
        admitted = segments.admitted(session=session, model_id=model.id)
        segs: list[tuple[str, str] | None] = [
            (cfg["segment_by"], v) for v in admitted.get(cfg["segment_by"], [])
        ]
    else:
        segs = [None]
    decisions: dict[str, list[Decision]] = {}
    for seg in segs:
        series = _series(session, model, cfg, seg, now, max_values, evaluated, lookback)
        fixed = _fixed_baseline(session, model, cfg, now, max_values, seg)
        decisions[f"{seg[0]}:{seg[1]}" if seg else ""] = decide(
            cfg,
            series,
            lookback,
            fixed_baseline=fixed,
            now=now,
            label_delay_days=model.label_delay_days,
        )
    if cfg["kind"] == "stall" and cfg.get("max_silence_hours"):
        decisions.setdefault("", []).append(_silence(session, model, cfg, now))
    verdicts = _verdicts(decisions, float(cfg["alpha"]))
    changed = _record(session, rule, decisions, verdicts, now)
    events = 0
    for segment in decisions:
        if lifecycle.advance(session, rule, model, segment, now, int(cfg["clear_after"])):
            events += 1
    return {"windows": changed, "events": events}


def _silence(session: Session, model: ModelRow, cfg: dict[str, Any], now: datetime) -> Decision:
    """No label received for max_silence_hours: one verdict per hour."""
    last = session.scalar(select(func.max(Label.received_at)).where(Label.model_id == model.id))
    hour = floor_hour(now)
    silent = last is None or (now - _utc(last)) > timedelta(hours=cfg["max_silence_hours"])
    age = None if last is None else (now - _utc(last)) / timedelta(hours=1)
    return Decision(
        hour,
        hour + timedelta(hours=1),
        silent,
        None,
        age,
        None,
        None,
        {"max_silence_hours": cfg["max_silence_hours"]},
    )


def _utc(value: Any) -> datetime:
    from belated.timeutil import from_db

    out = from_db(value)
    assert out is not None
    return out


def _verdicts(
    decisions: dict[str, list[Decision]], alpha: float
) -> dict[tuple[str, datetime], bool]:
    """Final verdicts, with BH across the segments of each window when there are several."""
    by_window: dict[datetime, list[tuple[str, Decision]]] = {}
    for seg, ds in decisions.items():
        for d in ds:
            by_window.setdefault(d.start, []).append((seg, d))
    out: dict[tuple[str, datetime], bool] = {}
    for start, items in by_window.items():
        with_p = [(s, d) for s, d in items if d.p_value is not None]
        adjusted: dict[str, float] = {}
        if len(with_p) > 1:
            adj, _ = benjamini_hochberg([d.p_value for _, d in with_p], q=alpha)  # type: ignore[misc]
            adjusted = {s: a for (s, _), a in zip(with_p, adj, strict=True)}
        for s, d in items:
            out[(s, start)] = d.breached(alpha, adjusted.get(s))
    return out


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
        (r.segment, _utc(r.window_start)): r
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

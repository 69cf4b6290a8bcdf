"""The evaluation job: load windows for each rule, decide, record, move alerts on."""

from __future__ import annotations

import logging
import math
from bisect import bisect_right
from datetime import datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import catalog, early, lifecycle, recording, snapshot
from belated.alerts.decide import (
    Baseline,
    Decision,
    Frozen,
    decide,
    pooled_baseline,
    verdicts,
)
from belated.alerts.inputs import Projection, WindowInput
from belated.alerts.schemas import RuleSettings, stored_settings
from belated.alerts.tables import Rule, RuleWindow
from belated.metrics.arrival import Curves, projected
from belated.metrics.load import ensure_fresh, epoch_hour, segment_counts
from belated.metrics.params import Range
from belated.metrics.windows import Cohort, curves_of, settled_window, to_stats, window_rows
from belated.store import segments
from belated.store.tables import ModelRow
from belated.store.totals import Totals
from belated.timeutil import from_db, window_step
from belated.zones import DEFAULT_ZONE, floor_local, local_iso, shift, zone

log = logging.getLogger(__name__)
MAX_EVALUATED = 120
MIN_EVALUATED = 30  # a first evaluation looks back far enough to catch what history shows
Segment = tuple[str, str] | None  # (tag key, value) of a fanned-out rule, None for all traffic


def settings_of(rule: Rule) -> RuleSettings:
    """A stored rule's effective settings: its JSON row validated again by the API schema.

    The one place a rules-table row becomes settings; evaluation reads nothing else of it.
    """
    return stored_settings(rule.kind, rule.measure, rule.granularity, rule.settings)


def _span(model: ModelRow, rule: RuleSettings) -> tuple[int, int]:
    """(windows to evaluate, windows of baseline lookback before them)."""
    step_days = window_step(rule.granularity) / timedelta(days=1)
    by_delay = math.ceil((model.label_delay_days + 2) / step_days) + 1
    evaluated = min(MAX_EVALUATED, max(MIN_EVALUATED, by_delay))
    return evaluated, min(MAX_EVALUATED, rule.baseline.windows * 3 + 2)


def zone_of(model: ModelRow) -> str:
    """The IANA name of the zone a model's day and week windows start at midnight in."""
    return model.time_zone or DEFAULT_ZONE


def _series_range(rule: RuleSettings, now: datetime, evaluated: int, zone_name: str) -> Range:
    """The windows a rule evaluates: the last `evaluated` ones up to the current one, the
    same windows GET /metrics answers for the model (local days and weeks of its zone)."""
    g, tz = rule.granularity, zone(zone_name)
    end = shift(floor_local(now, g, tz), g, 1, tz)
    return Range(g, shift(end, g, -evaluated, tz), end, zone_name)


def _baseline_range(rule: RuleSettings, zone_name: str) -> Range | None:
    """A fixed baseline's windows (None for a trailing baseline), aligned down to the
    model's windows as GET /metrics aligns `start` and `end`."""
    b, g, tz = rule.baseline, rule.granularity, zone(zone_name)
    if b.start is None or b.end is None:
        return None
    return Range(g, floor_local(b.start, g, tz), floor_local(b.end, g, tz), zone_name)


def _window_rows(
    session: Session,
    model: ModelRow,
    rng: Range,
    lookback: int,
    segment: Segment,
    now: datetime,
) -> tuple[list[datetime], list[list[Cohort]]]:
    """The rollup rows of each base window of the range, `lookback` windows before it first."""
    return window_rows(session, model, rng, lookback, (segment,) if segment else (), now)


def _summed(cohorts: list[Cohort]) -> Totals:
    out = Totals()
    for _, _, totals in cohorts:
        out.add(totals)
    return out


def _projection(
    rule: RuleSettings,
    cohorts: list[Cohort],
    model: ModelRow,
    now: datetime,
    curves: Curves | None,
) -> Projection | None:
    """The rule's measure projected on an unsettled window (None without curves)."""
    if curves is None or not cohorts:
        return None
    answer = projected(cohorts, curves, model, now, beta=1.0, confidence=early.PROJECTED_CONFIDENCE)
    return early.projection_of(rule.measure or "", answer)


def _inputs(
    session: Session,
    model: ModelRow,
    rule: RuleSettings,
    rng: Range,
    lookback: int,
    segment: Segment,
    now: datetime,
    curves: Curves | None,
    looked: frozenset[datetime] | None = None,
) -> list[WindowInput]:
    """The windows of a range (and `lookback` before it) as a rule sees them. With
    `rule.early` and `looked` given (the early looks on record), closed unsettled windows
    not looked at yet carry their projection, and those looked at are marked so."""
    starts, rows = _window_rows(session, model, rng, lookback, segment, now)
    ends = [*starts[1:], rng.end]  # a local day lasts 23, 24 or 25 hours
    accs = [_summed(r) for r in rows]
    measure = rule.measure or ""
    tag_counts: dict[int, dict[str, int]] = {}
    if measure.startswith("tag_psi:") and starts:
        tag_counts = _tag_counts(session, model, measure.split(":", 1)[1], [*starts, rng.end])
    looks = rule.early and looked is not None
    seen = looked or frozenset()
    out = []
    for i, (s, e, a) in enumerate(zip(starts, ends, accs, strict=True)):
        closed = e <= now
        settled = settled_window(a, e, model, now, curves)
        w = WindowInput(
            start=s,
            end=e,
            closed=closed,
            settled=settled,
            stats=to_stats(a),
            tag_counts=tag_counts.get(i, {}),
            early_look=looks and s in seen,
        )
        if looks and closed and not settled and s not in seen:
            w.projection = _projection(rule, rows[i], model, now, curves)
        out.append(w)
    return out


def _tag_counts(
    session: Session, model: ModelRow, key: str, bounds: list[datetime]
) -> dict[int, dict[str, int]]:
    """Predictions per value of the tag `key` in each window between `bounds`, by window
    index. Daily rows serve windows that start at UTC midnights; a window boundary at
    another hour (a zoned model's local midnight) needs the hourly rows."""
    hours = [epoch_hour(b) for b in bounds]
    level = "d" if all(h % 24 == 0 for h in hours) else "h"
    raw = segment_counts(session, model, key=key, level=level, lo=hours[0], hi=hours[-1])
    out: dict[int, dict[str, int]] = {}
    for start, counts in raw.items():
        i = bisect_right(hours, start) - 1
        if not 0 <= i < len(hours) - 1:
            continue
        bucket = out.setdefault(i, {})
        for k, n in counts.items():
            bucket[k] = bucket.get(k, 0) + n
    return out


def _series(
    session: Session,
    model: ModelRow,
    rule: RuleSettings,
    segment: Segment,
    now: datetime,
    evaluated: int,
    lookback: int,
    curves: Curves | None,
    looked: frozenset[datetime] = frozenset(),
) -> list[WindowInput]:
    rng = _series_range(rule, now, evaluated, zone_of(model))
    return _inputs(session, model, rule, rng, lookback, segment, now, curves, looked)


def _fixed_baseline(
    session: Session,
    model: ModelRow,
    rule: RuleSettings,
    now: datetime,
    segment: Segment,
    curves: Curves | None,
) -> Baseline | None:
    """A fixed range's baseline; it must be settled like a trailing one (closed, for a
    label-free measure): until it is, it carries the reason and no decision is made."""
    rng = _baseline_range(rule, zone_of(model))
    if rng is None:
        return None
    windows = _inputs(session, model, rule, rng, 0, segment, now, curves)
    if not windows:
        return None
    label_based = catalog.is_label_based(rule.measure or "")
    waiting = [w for w in windows if not (w.settled if label_based else w.closed)]
    reason = None
    if waiting:
        state = "settled" if label_based else "closed"
        start, end = local_iso(rng.start, rng.tz), local_iso(rng.end, rng.tz)
        reason = (
            f"the baseline's {len(waiting)} of {len(windows)} windows from "
            f"{start} to {end} are not {state} yet"
        )
    return pooled_baseline(windows, fixed=True, reason=reason)


def _held(session: Session, rule: Rule, segment: str) -> Frozen | None:
    """The frozen baseline of the (rule, segment)'s active alert, if it has one."""
    alert = lifecycle.active_alert(session, rule.id, segment)
    if alert is None or not alert.baseline or "stats" not in alert.baseline:
        return None
    since = from_db(alert.started_at) or from_db(alert.raised_at)
    assert since is not None
    return Frozen(baseline=snapshot.load(alert.baseline), since=since)


def _excluded(rows: list[RuleWindow], segment: str) -> set[datetime]:
    """Windows that never enter their rule's baseline again: the breached ones."""
    out: set[datetime] = set()
    for r in rows:
        if r.segment == segment and r.breached:
            start = from_db(r.window_start)
            assert start is not None
            out.add(start)
    return out


def _looked(rows: list[RuleWindow], segment: str) -> frozenset[datetime]:
    """Windows whose early look is on record (one look per window, `alerts/early.py`): an
    early row that made a decision (a row that only says why none was made does not count)."""
    out: set[datetime] = set()
    for r in rows:
        if r.segment == segment and r.early and not (r.baseline or {}).get("reason"):
            start = from_db(r.window_start)
            assert start is not None
            out.add(start)
    return frozenset(out)


def evaluate_rule(
    session: Session, rule: Rule, model: ModelRow, now: datetime, max_values: int
) -> dict[str, int]:
    """Evaluate one rule over its segments; record windows; advance its alerts.

    A retired rule is not evaluated: its alerts and breaches stay as they were.
    """
    if rule.retired_at is not None:
        return {"windows": 0, "events": 0}
    cfg = settings_of(rule)
    evaluated, lookback = _span(model, cfg)
    # bring the rule's ranges up to date once, here, for every segment below
    series = _series_range(cfg, now, evaluated, zone_of(model))
    lo, hi = series.bounds(lookback)[0], series.end
    fixed_range = _baseline_range(cfg, zone_of(model))
    if fixed_range is not None:
        lo, hi = min(lo, fixed_range.start), max(hi, fixed_range.end)
    ensure_fresh(session, model, epoch_hour(lo), epoch_hour(hi), max_values)
    curves = curves_of(session, model, now)  # settledness by class, all traffic
    segs: list[Segment] = [None]
    if cfg.segment_by:
        admitted = segments.admitted(session=session, model_id=model.id)
        segs = [(cfg.segment_by, v) for v in admitted.get(cfg.segment_by, [])]
    stored = list(session.scalars(select(RuleWindow).where(RuleWindow.rule_id == rule.id)))
    decisions: dict[str, list[Decision]] = {}
    for seg in segs:
        key = f"{seg[0]}:{seg[1]}" if seg else ""
        looked = _looked(stored, key)
        # a segment with the labels for its own curves uses them (memoised per request)
        own = curves if seg is None else curves_of(session, model, now, (seg,))
        windows = _series(session, model, cfg, seg, now, evaluated, lookback, own, looked)
        fixed = _fixed_baseline(session, model, cfg, now, seg, curves)
        decisions[key] = decide(
            cfg,
            windows,
            lookback,
            fixed_baseline=fixed,
            frozen=_held(session, rule, key),
            excluded=_excluded(stored, key),
            now=now,
            label_delay_days=model.label_delay_days,
        )
    if cfg.kind == "stall" and cfg.max_silence_hours:
        silent = recording.silence(session, model, cfg.max_silence_hours, now)
        decisions.setdefault("", []).append(silent)
    changed = recording.record(
        session, rule, stored, decisions, verdicts(decisions, cfg.alpha), now
    )
    events = 0
    for segment, ds in decisions.items():
        if lifecycle.advance(session, rule, model, segment, now, cfg.clear_after, ds):
            events += 1
    return {"windows": changed, "events": events}

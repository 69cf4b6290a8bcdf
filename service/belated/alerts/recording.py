"""What an evaluation leaves behind: one row per evaluated (rule, segment, window).

A window decided again (late labels, a settled decision after an early look) is updated in
its row, never counted twice; a settled window decided again keeps when, and what it was
before (`decided_again_at`, `previous`), so that its alert can say so. The lifecycle
(`alerts/lifecycle.py`) moves the alerts on from these rows.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts.decide import Decision, finite
from belated.alerts.tables import Rule, RuleWindow
from belated.store.tables import Label, ModelRow
from belated.timeutil import floor_hour, from_db, iso


def silence(session: Session, model: ModelRow, max_hours: float, now: datetime) -> Decision:
    """No label received for max_silence_hours: one verdict per hour."""
    last = from_db(
        session.scalar(select(func.max(Label.received_at)).where(Label.model_id == model.id))
    )
    hour = floor_hour(now)
    silent = last is None or (now - last) > timedelta(hours=max_hours)
    return Decision(
        start=hour,
        end=hour + timedelta(hours=1),
        condition=silent,
        value=None if last is None else (now - last) / timedelta(hours=1),
        baseline={"max_silence_hours": max_hours},
        recovered=not silent,
    )


def record(
    session: Session,
    rule: Rule,
    stored: list[RuleWindow],
    decisions: dict[str, list[Decision]],
    verdicts: dict[tuple[str, datetime], bool],
    now: datetime,
) -> int:
    """Upsert one row per (rule, segment, window); a window changed by late labels is
    updated in place, never counted twice."""
    existing = {(r.segment, from_db(r.window_start)): r for r in stored}
    changed = 0
    for seg, ds in decisions.items():
        for d in ds:
            breached = verdicts[(seg, d.start)]
            baseline = _clean(d.baseline)
            if d.reason is not None:
                baseline = {**(baseline or {}), "reason": d.reason}
            values = {
                "breached": breached,
                "value": finite(d.value),
                "low": finite(d.low),
                "high": finite(d.high),
                "baseline": baseline,
                "p_value": finite(d.p_value),
                "recovered": d.recovered,
                "early": d.early,
                "window_end": d.end,
                "evaluated_at": now,
            }
            row = existing.get((seg, d.start))
            if row is None:
                session.add(
                    RuleWindow(rule_id=rule.id, segment=seg, window_start=d.start, **values)
                )
                changed += 1
            elif any(getattr(row, k) != values[k] for k in _COMPARED):
                if not row.early and not d.early:  # a settled decision, taken again
                    row.decided_again_at = now
                    row.previous = {
                        "breached": row.breached,
                        "value": row.value,
                        "p_value": row.p_value,
                        "decided_at": iso(row.evaluated_at),
                    }
                for k, v in values.items():
                    setattr(row, k, v)
                changed += 1
    session.flush()
    return changed


_COMPARED = ("breached", "value", "low", "high", "baseline", "p_value", "recovered", "early")


def _clean(value: Any) -> Any:
    if isinstance(value, float):
        return finite(value)
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    return value

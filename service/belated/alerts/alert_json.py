"""An alert as the API, the dashboard and every webhook event show it.

An alert explains itself (DESIGN.md, "Rules and alerts"): what fired and why, in words and
numbers, whether it rests on early looks at projected values, its notes, where to look, and
its breaches (each marked early or not).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import explain
from belated.alerts.schemas import stored_settings
from belated.alerts.states import ACTIVE
from belated.alerts.tables import Alert, AlertNote, Rule, RuleWindow
from belated.store.tables import ModelRow
from belated.timeutil import from_db, iso
from belated.zones import DEFAULT_ZONE


def _window(b: RuleWindow) -> dict[str, Any]:
    return {
        "window_start": iso(b.window_start),
        "window_end": iso(b.window_end),
        "breached": b.breached,
        "recovered": b.recovered,
        "value": b.value,
        "low": b.low,
        "high": b.high,
        "baseline": b.baseline,
        "p_value": b.p_value,
        "early": b.early,
        "decided_again_at": iso(b.decided_again_at) if b.decided_again_at else None,
        "previous": b.previous,
    }


def _rule_baseline(rule: Rule, alert: Alert) -> dict[str, Any] | None:
    """What the alert compares with: its frozen baseline, or the rule's fixed bounds."""
    if alert.baseline:
        kept = {k: v for k, v in alert.baseline.items() if k not in ("stats", "tag_counts")}
        return {**kept, "frozen": alert.state in ACTIVE}
    s = rule.settings or {}
    if rule.kind in ("floor", "stall") and s.get("threshold") is not None:
        return {"threshold": s["threshold"]}
    if rule.kind == "traffic":
        return {"low": s.get("low"), "high": s.get("high")}
    if rule.kind == "stall":
        return {"max_silence_hours": s.get("max_silence_hours")}
    return None


def alert_dict(
    session: Session,
    alert: Alert,
    model_name: str | None = None,
    public_url: str | None = None,
    time_zone: str | None = None,
) -> dict[str, Any]:
    """An alert as the API and events show it: what fired and why, in words and numbers,
    its notes, where to look, and its breaches. Times are UTC instants; `time_zone` is the
    model's, whose local days and weeks the windows are."""
    if model_name is None or time_zone is None:
        found = session.execute(
            select(ModelRow.name, ModelRow.time_zone).where(ModelRow.id == alert.model_id)
        ).one()
        model_name, time_zone = found[0], found[1]
    rule = session.get(Rule, alert.rule_id)
    assert rule is not None and model_name is not None
    cfg = stored_settings(rule.kind, rule.measure, rule.granularity, rule.settings)
    breaches = session.scalars(
        select(RuleWindow).where(RuleWindow.alert_id == alert.id).order_by(RuleWindow.window_start)
    ).all()
    started = from_db(alert.started_at)
    latest = session.scalar(
        select(RuleWindow)
        .where(
            RuleWindow.rule_id == rule.id,
            RuleWindow.segment == alert.segment,
            RuleWindow.window_start >= (started or from_db(alert.raised_at)),
            RuleWindow.value.is_not(None),
        )
        .order_by(RuleWindow.window_start.desc())
        .limit(1)
    )
    notes = session.scalars(
        select(AlertNote).where(AlertNote.alert_id == alert.id).order_by(AlertNote.id)
    ).all()
    baseline = _rule_baseline(rule, alert)
    step_end = from_db(latest.window_end) if latest is not None else None
    # an early breach a settled decision overturned stays listed, but did not start anything
    first = next((b for b in breaches if b.breached), breaches[0] if breaches else None)
    return {
        "id": alert.id,
        "number": alert.seq,
        "rule_id": alert.rule_id,
        "model": model_name,
        "time_zone": time_zone or DEFAULT_ZONE,
        "segment": alert.segment or None,
        "kind": rule.kind,
        "measure": rule.measure,
        "granularity": rule.granularity,
        "rule": {
            "id": rule.id,
            "kind": rule.kind,
            "measure": rule.measure,
            "granularity": rule.granularity,
            "retired": rule.retired_at is not None,
            "retired_at": iso(rule.retired_at) if rule.retired_at else None,
        },
        "description": explain.sentence(
            cfg, alert.baseline, alert.segment, early=alert.early, time_zone=time_zone or "UTC"
        ),
        "state": alert.state,
        # raised on early looks at projected values, not yet confirmed by a settled window
        "early": alert.early,
        "confirmed_at": iso(alert.confirmed_at) if alert.confirmed_at else None,
        "raised_at": iso(alert.raised_at),
        "noted_at": iso(alert.noted_at) if alert.noted_at else None,
        "cleared_at": iso(alert.cleared_at) if alert.cleared_at else None,
        "cleared_reason": alert.cleared_reason,
        "started_at": iso(started) if started else None,
        "first_window": (
            {"start": iso(first.window_start), "end": iso(first.window_end)} if first else None
        ),
        "baseline": baseline,
        "latest": _window(latest) if latest is not None else None,
        "notes": [{"text": n.text, "author": n.author, "at": iso(n.created_at)} for n in notes],
        "link": explain.link(
            model_name, rule.granularity, alert.segment, started, step_end, public_url
        ),
        "breaches": [_window(b) for b in breaches],
    }

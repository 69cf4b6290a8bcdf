"""The alert lifecycle and its events.

                 breach                        acknowledge
   (no alert) ----------> open ------------------------------> acknowledged
       ^      alert.opened  |                                       |
       |                    | clear_after clean windows             | clear_after clean windows
       |                    | alert.resolved                        | alert.resolved
       |                    v                                       |
       +--------------- resolved <----------------------------------+
         the next breach
         opens a new alert

   open, acknowledged: a later breach joins the alert (no event)
   muted rule: the same moves, but no event is written to the outbox

One alert per (rule, segment) at a time: later breaches join the open or acknowledged
alert; after it resolves, the next breach opens a new one. Opening and resolving are events,
written to the outbox in the same transaction as the state change (never when muted).
"""

from __future__ import annotations

import secrets
from datetime import datetime, timedelta
from typing import Any

import orjson
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts import numbers
from belated.alerts.tables import Alert, Delivery, Rule, RuleWindow, Webhook
from belated.store.tables import ModelRow
from belated.timeutil import iso, to_utc

ACTIVE = ("open", "acknowledged")
DELIVERY_TTL = timedelta(hours=24)


def active_alert(session: Session, rule_id: str, segment: str) -> Alert | None:
    """The open or acknowledged alert of (rule, segment), if any."""
    return session.scalar(
        select(Alert).where(
            Alert.rule_id == rule_id, Alert.segment == segment, Alert.state.in_(ACTIVE)
        )
    )


def open_counts(session: Session) -> dict[int, int]:
    """Open or acknowledged alerts by model id (a model without any is absent)."""
    rows = session.execute(
        select(Alert.model_id, func.count()).where(Alert.state.in_(ACTIVE)).group_by(Alert.model_id)
    )
    return {int(model_id): int(n) for model_id, n in rows}


def alert_dict(session: Session, alert: Alert, model_name: str | None = None) -> dict[str, Any]:
    """An alert as the API and events show it, with its breaches."""
    if model_name is None:
        model_name = session.scalar(select(ModelRow.name).where(ModelRow.id == alert.model_id))
    breaches = session.scalars(
        select(RuleWindow).where(RuleWindow.alert_id == alert.id).order_by(RuleWindow.window_start)
    ).all()
    return {
        "id": alert.id,
        "rule_id": alert.rule_id,
        "model": model_name,
        "segment": alert.segment or None,
        "state": alert.state,
        "opened_at": iso(alert.opened_at),
        "acknowledged_at": iso(alert.acknowledged_at) if alert.acknowledged_at else None,
        "resolved_at": iso(alert.resolved_at) if alert.resolved_at else None,
        "breaches": [
            {
                "window_start": iso(b.window_start),
                "window_end": iso(b.window_end),
                "breached": b.breached,
                "value": b.value,
                "low": b.low,
                "high": b.high,
                "baseline": b.baseline,
                "p_value": b.p_value,
            }
            for b in breaches
        ],
    }


def emit(session: Session, alert: Alert, event_type: str, now: datetime, muted: bool) -> int:
    """Write one outbox row per live webhook of the project (none when the rule is muted)."""
    if muted:
        return 0
    payload = orjson.dumps(
        {"type": event_type, "timestamp": iso(now), "data": alert_dict(session, alert)}
    ).decode()
    hooks = session.scalars(
        select(Webhook).where(Webhook.project_id == alert.project_id, Webhook.disabled_at.is_(None))
    ).all()
    event_id = "msg_" + secrets.token_hex(12)
    for hook in hooks:
        session.add(
            Delivery(
                webhook_id=hook.id,
                event_id=event_id,
                event_type=event_type,
                alert_id=alert.id,
                payload=payload,
                state="pending",
                attempts=0,
                next_attempt_at=now,
                created_at=now,
                expires_at=now + DELIVERY_TTL,
            )
        )
    return len(hooks)


def advance(
    session: Session, rule: Rule, model: ModelRow, segment: str, now: datetime, clear_after: int
) -> str | None:
    """Move the (rule, segment) lifecycle on after an evaluation; return the event, if any."""
    muted = rule.muted_until is not None and to_utc(rule.muted_until) > now
    alert = active_alert(session, rule.id, segment)
    fresh = session.scalars(
        select(RuleWindow).where(
            RuleWindow.rule_id == rule.id,
            RuleWindow.segment == segment,
            RuleWindow.breached.is_(True),
            RuleWindow.alert_id.is_(None),
        )
    ).all()
    event = None
    if fresh:
        if alert is None:
            alert = Alert(
                id="alr_" + secrets.token_hex(8),
                seq=numbers.next_seq(session=session, project_id=model.project_id),
                project_id=model.project_id,
                model_id=model.id,
                rule_id=rule.id,
                segment=segment,
                state="open",
                opened_at=now,
            )
            session.add(alert)
            session.flush()
            event = "alert.opened"
        for b in fresh:
            b.alert_id = alert.id
        session.flush()
        if event:
            emit(session, alert, event, now, muted)
        return event
    if alert is None:
        return None
    last = session.scalar(
        select(func.max(RuleWindow.window_start)).where(
            RuleWindow.alert_id == alert.id, RuleWindow.breached.is_(True)
        )
    )
    if last is None:
        clean = clear_after
    else:
        clean = (
            session.scalar(
                select(func.count())
                .select_from(RuleWindow)
                .where(
                    RuleWindow.rule_id == rule.id,
                    RuleWindow.segment == segment,
                    RuleWindow.breached.is_(False),
                    RuleWindow.window_start > last,
                )
            )
            or 0
        )
    if clean >= clear_after:
        alert.state, alert.resolved_at = "resolved", now
        session.flush()
        emit(session, alert, "alert.resolved", now, muted)
        return "alert.resolved"
    return None


def acknowledge(session: Session, alert: Alert, now: datetime) -> Alert:
    """Acknowledge an open alert (idempotent; a resolved alert stays resolved)."""
    if alert.state == "open":
        alert.state, alert.acknowledged_at = "acknowledged", now
        session.flush()
    return alert

"""The alert lifecycle and its events.

                 breach                           a note
   (no alert) ----------> raised ------------------------------> noted --+
       ^      alert.raised  |                      alert.noted     |     | a further note
       |                    |                                      |<----+ alert.noted
       |                    | recovered for clear_after windows    | recovered for clear_after
       |                    | alert.cleared                        | windows, alert.cleared
       |                    v                                      |
       +--------------- cleared <----------------------------------+
         the next breach
         raises a new alert

   raised, noted: a later breach joins the alert (no event)
   muted rule: the same moves, but no event is written to the outbox

One alert per (rule, segment) at a time. When it is raised it keeps the baseline its first
breach was decided against, frozen, and the first breached window (when the problem
started). It clears only on recovery: the measure back within tolerance of that frozen
baseline for `clear_after` evaluated windows in a row, after its last breach (a window that
is merely not significant does not count). A note keeps who said what and when, and makes a
raised alert `noted`; a note on a cleared alert is kept and changes nothing else. Each move
is an event, written to the outbox in the same transaction as the change (never when muted).
"""

from __future__ import annotations

import secrets
from datetime import datetime, timedelta
from typing import Any

import orjson
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts import explain, numbers, snapshot
from belated.alerts.decide import Decision
from belated.alerts.schemas import stored_settings
from belated.alerts.tables import Alert, AlertNote, Delivery, Rule, RuleWindow, Webhook
from belated.store.tables import ModelRow, Token
from belated.timeutil import from_db, iso, to_utc

STATES = ("raised", "noted", "cleared")
ACTIVE = ("raised", "noted")
EVENTS = ("alert.raised", "alert.noted", "alert.cleared")
DELIVERY_TTL = timedelta(hours=24)


def active_alert(session: Session, rule_id: str, segment: str) -> Alert | None:
    """The raised or noted alert of (rule, segment), if any."""
    return session.scalar(
        select(Alert).where(
            Alert.rule_id == rule_id, Alert.segment == segment, Alert.state.in_(ACTIVE)
        )
    )


def open_counts(session: Session) -> dict[int, int]:
    """Raised or noted alerts by model id (a model without any is absent)."""
    rows = session.execute(
        select(Alert.model_id, func.count()).where(Alert.state.in_(ACTIVE)).group_by(Alert.model_id)
    )
    return {int(model_id): int(n) for model_id, n in rows}


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
) -> dict[str, Any]:
    """An alert as the API and events show it: what fired and why, in words and numbers,
    its notes, where to look, and its breaches."""
    if model_name is None:
        model_name = session.scalar(select(ModelRow.name).where(ModelRow.id == alert.model_id))
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
    first = breaches[0] if breaches else None
    return {
        "id": alert.id,
        "number": alert.seq,
        "rule_id": alert.rule_id,
        "model": model_name,
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
        "description": explain.sentence(cfg, alert.baseline, alert.segment),
        "state": alert.state,
        "raised_at": iso(alert.raised_at),
        "noted_at": iso(alert.noted_at) if alert.noted_at else None,
        "cleared_at": iso(alert.cleared_at) if alert.cleared_at else None,
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


def _muted(rule: Rule, now: datetime) -> bool:
    return rule.muted_until is not None and to_utc(rule.muted_until) > now


def _freeze(alert: Alert, decisions: list[Decision]) -> None:
    """Keep, with an alert that has none, the baseline its first breach was decided on."""
    if alert.baseline or alert.started_at is None:
        return
    started = from_db(alert.started_at)
    for d in decisions:
        if d.start == started and d.basis is not None:
            alert.baseline = snapshot.dump(d.basis, (d.baseline or {}).get("value"))
            return


def advance(
    session: Session,
    rule: Rule,
    model: ModelRow,
    segment: str,
    now: datetime,
    clear_after: int,
    decisions: list[Decision] | None = None,
) -> str | None:
    """Move the (rule, segment) lifecycle on after an evaluation; return the event, if any.

    `decisions` are this evaluation's decisions of the segment: the one on the first
    breached window gives a new alert its frozen baseline.
    """
    muted = _muted(rule, now)
    alert = active_alert(session, rule.id, segment)
    fresh = session.scalars(
        select(RuleWindow)
        .where(
            RuleWindow.rule_id == rule.id,
            RuleWindow.segment == segment,
            RuleWindow.breached.is_(True),
            RuleWindow.alert_id.is_(None),
        )
        .order_by(RuleWindow.window_start)
    ).all()
    event = None
    if fresh:
        first = from_db(fresh[0].window_start)
        assert first is not None
        if alert is None:
            alert = Alert(
                id="alr_" + secrets.token_hex(8),
                seq=numbers.next_seq(session=session, project_id=model.project_id),
                project_id=model.project_id,
                model_id=model.id,
                rule_id=rule.id,
                segment=segment,
                state="raised",
                raised_at=now,
                started_at=first,
            )
            session.add(alert)
            session.flush()
            event = "alert.raised"
        else:
            known = from_db(alert.started_at)
            if known is None or first < known:  # a late-decided earlier window joins
                alert.started_at = first
        for b in fresh:
            b.alert_id = alert.id
        _freeze(alert, decisions or [])
        session.flush()
        if event:
            emit(session, alert, event, now, muted)
        return event
    if alert is None:
        return None
    if alert.started_at is None:  # an alert raised before the first window was kept
        alert.started_at = session.scalar(
            select(func.min(RuleWindow.window_start)).where(
                RuleWindow.alert_id == alert.id, RuleWindow.breached.is_(True)
            )
        )
    _freeze(alert, decisions or [])
    last = session.scalar(
        select(func.max(RuleWindow.window_start)).where(
            RuleWindow.alert_id == alert.id, RuleWindow.breached.is_(True)
        )
    )
    after = last if last is not None else alert.started_at
    query = select(RuleWindow.recovered).where(
        RuleWindow.rule_id == rule.id,
        RuleWindow.segment == segment,
        RuleWindow.recovered.is_not(None),
    )
    if after is not None:
        query = query.where(RuleWindow.window_start > after)
    # cleared once `clear_after` evaluated windows in a row were back within tolerance of the
    # frozen baseline after the last breach: the decisions stop holding that baseline there
    # (alerts/decide.py), so the windows after such a run are judged against a new one
    run = 0
    for recovered in session.scalars(query.order_by(RuleWindow.window_start)):
        run = run + 1 if recovered else 0
        if run >= clear_after:
            break
    if run >= clear_after:
        alert.state, alert.cleared_at = "cleared", now
        session.flush()
        emit(session, alert, "alert.cleared", now, muted)
        return "alert.cleared"
    session.flush()
    return None


def author_of(session: Session, token_id: str) -> str:
    """Who wrote a note: the token's name, else its id."""
    name = session.scalar(select(Token.name).where(Token.id == token_id))
    return name or token_id


def note(session: Session, alert: Alert, text: str, author: str, now: datetime) -> Alert:
    """Keep a note on an alert; a raised alert becomes noted (a cleared one stays cleared).
    Every note is an `alert.noted` event."""
    session.add(AlertNote(alert_id=alert.id, text=text, author=author[:160], created_at=now))
    if alert.state == "raised":
        alert.state = "noted"
    if alert.noted_at is None:
        alert.noted_at = now
    session.flush()
    rule = session.get(Rule, alert.rule_id)
    emit(session, alert, "alert.noted", now, rule is not None and _muted(rule, now))
    return alert

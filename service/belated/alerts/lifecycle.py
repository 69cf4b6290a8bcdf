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

   early (a rule with `early: true`; the flag rides on raised and noted alike):
     breaches on early looks only  -> raised with early = true           alert.raised
     a settled breach joins it     -> early = false, confirmed_at         alert.raised
     no breach holds it any more   -> cleared, cleared_reason withdrawn   alert.cleared
     (its early windows were decided settled and did not breach)

One alert per (rule, segment) at a time. When it is raised it keeps the baseline its first
breach was decided against, frozen, and the first breached window (when the problem
started). It clears only on recovery: the measure back within tolerance of that frozen
baseline for `clear_after` evaluated windows in a row, after its last breach (a window that
is merely not significant does not count). An early alert, raised on projected values of
unsettled windows, does not clear on recovery (early looks never say recovered): a settled
window confirms it, or, once none of its breaches stands, it is withdrawn. A note keeps who
said what and when, and makes a raised alert `noted`; a note on a cleared alert is kept and
changes nothing else. Each move is an event, written to the outbox in the same transaction
as the change (never when muted).
"""

from __future__ import annotations

import secrets
from datetime import datetime, timedelta

import orjson
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.alerts import numbers, snapshot
from belated.alerts.alert_json import alert_dict as alert_dict
from belated.alerts.decide import Decision
from belated.alerts.states import ACTIVE as ACTIVE
from belated.alerts.states import EVENTS as EVENTS
from belated.alerts.states import STATES as STATES
from belated.alerts.states import WITHDRAWN
from belated.alerts.tables import Alert, AlertNote, Delivery, Rule, RuleWindow, Webhook
from belated.store.tables import ModelRow, Token
from belated.timeutil import from_db, iso, to_utc

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
                early=all(b.early for b in fresh),
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
        if event is None and _confirm(session, alert, now):
            event = "alert.raised"
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
    if alert.early:
        return _settle_early(session, alert, now, muted)
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
        alert.cleared_reason = (
            f"recovered: back within tolerance of the baseline for {clear_after} "
            f"evaluated window{'s' if clear_after != 1 else ''} in a row"
        )
        session.flush()
        emit(session, alert, "alert.cleared", now, muted)
        return "alert.cleared"
    session.flush()
    return None


def _standing(session: Session, alert: Alert, *, settled: bool) -> bool:
    """Whether a breach of the alert stands (only settled ones, with `settled`)."""
    query = select(RuleWindow.id).where(
        RuleWindow.alert_id == alert.id, RuleWindow.breached.is_(True)
    )
    if settled:
        query = query.where(RuleWindow.early.is_(False))
    return session.scalar(query.limit(1)) is not None


def _confirm(session: Session, alert: Alert, now: datetime) -> bool:
    """An early alert with a settled breach among its own is confirmed: no longer early."""
    if not alert.early or not _standing(session, alert, settled=True):
        return False
    alert.early, alert.confirmed_at = False, now
    session.flush()
    return True


def _settle_early(session: Session, alert: Alert, now: datetime, muted: bool) -> str | None:
    """An early alert after an evaluation with no new breach: confirmed when one of its
    windows was decided settled and breached, withdrawn when none of its breaches stands
    (the settled decisions on its early windows did not bear them out), else held."""
    if _confirm(session, alert, now):
        emit(session, alert, "alert.raised", now, muted)
        return "alert.raised"
    if _standing(session, alert, settled=False):
        return None
    alert.state, alert.cleared_at, alert.cleared_reason = "cleared", now, WITHDRAWN
    session.flush()
    emit(session, alert, "alert.cleared", now, muted)
    return "alert.cleared"


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

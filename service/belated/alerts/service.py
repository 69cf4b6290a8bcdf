"""Service functions for rules, alerts and webhooks (the routes stay thin)."""

from __future__ import annotations

import secrets
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import lifecycle, signing, urls
from belated.alerts.schemas import DEFAULTS, RuleRead, check_rule
from belated.alerts.tables import Alert, Delivery, Rule, RuleWindow, Webhook
from belated.clock import now
from belated.errors import Invalid, Problem, field_error
from belated.store.tables import ModelRow
from belated.timeutil import iso, parse_ts, to_utc

SETTING_KEYS = (
    "threshold",
    "mode",
    "tolerance",
    "alpha",
    "min_support",
    "baseline",
    "segment_by",
    "clear_after",
    "low",
    "high",
    "max_silence_hours",
)


def _invalid(field: str, reason: str) -> Invalid:
    return Invalid([field_error(None, field, reason)], detail=f"'{field}': {reason}")


def rule_read(rule: Rule, model_name: str) -> RuleRead:
    """A rule as the API answers it."""
    cfg = {**DEFAULTS, **{k: v for k, v in rule.settings.items() if v is not None}}
    muted = rule.muted_until is not None and to_utc(rule.muted_until) > now()
    return RuleRead(
        id=rule.id,
        model=model_name,
        kind=rule.kind,
        measure=rule.measure,
        granularity=rule.granularity,
        muted_until=rule.muted_until and to_utc(rule.muted_until),
        muted=muted,
        created_at=to_utc(rule.created_at),
        updated_at=to_utc(rule.updated_at),
        **{k: cfg[k] for k in SETTING_KEYS},
    )


def _settings(fields: dict[str, Any]) -> dict[str, Any]:
    out = {k: fields[k] for k in SETTING_KEYS if k in fields}
    if isinstance(out.get("baseline"), dict):
        out["baseline"] = {
            k: (iso(v) if isinstance(v, datetime) else v)
            for k, v in out["baseline"].items()
            if v is not None
        }
    return out


def create_rule(*, session: Session, model: ModelRow, fields: dict[str, Any]) -> Rule:
    """Create a rule on a model."""
    stamp = now()
    rule = Rule(
        id="rul_" + secrets.token_hex(8),
        model_id=model.id,
        kind=fields["kind"],
        measure=fields.get("measure"),
        granularity=fields.get("granularity") or "day",
        settings=_settings(fields),
        muted_until=fields.get("muted_until"),
        created_at=stamp,
        updated_at=stamp,
    )
    session.add(rule)
    session.flush()
    return rule


def get_rule(*, session: Session, model: ModelRow, rule_id: str) -> Rule:
    """A rule of the model, or 404."""
    rule = session.get(Rule, rule_id)
    if rule is None or rule.model_id != model.id:
        raise Problem(404, f"no rule {rule_id!r} on model {model.name!r}")
    return rule


def list_rules(*, session: Session, model: ModelRow) -> list[Rule]:
    """The model's rules, oldest first."""
    return list(
        session.scalars(
            select(Rule).where(Rule.model_id == model.id).order_by(Rule.created_at, Rule.id)
        )
    )


def update_rule(*, session: Session, rule: Rule, fields: dict[str, Any]) -> Rule:
    """Change a rule; the result must still be a rule that can work."""
    merged = {**rule.settings, **_settings(fields)}
    measure = fields.get("measure", rule.measure)
    try:
        check_rule(rule.kind, {**merged, "measure": measure})
    except ValueError as exc:
        raise _invalid("measure" if "measure" in str(exc) else "rule", str(exc)) from None
    rule.settings = merged
    rule.measure = measure
    if "granularity" in fields and fields["granularity"]:
        rule.granularity = fields["granularity"]
    if "muted_until" in fields:
        rule.muted_until = fields["muted_until"]
    rule.updated_at = now()
    session.flush()
    return rule


def delete_rule(*, session: Session, rule: Rule) -> None:
    """Delete a rule with its evaluated windows and alerts."""
    for table in (RuleWindow, Alert):
        for row in session.scalars(select(table).where(table.rule_id == rule.id)):
            session.delete(row)
    session.delete(rule)
    session.flush()


def list_alerts(
    *,
    session: Session,
    project_id: int,
    state: str | None,
    model: str | None,
    since: str | None,
    after: int | None,
    limit: int,
) -> tuple[list[dict[str, Any]], int | None]:
    """Alerts of the project, newest first, with their breaches; cursor is the last seq."""
    query = (
        select(Alert, ModelRow.name)
        .join(ModelRow, ModelRow.id == Alert.model_id)
        .where(Alert.project_id == project_id)
    )
    if state:
        if state not in ("open", "acknowledged", "resolved"):
            raise _invalid("state", "must be open, acknowledged or resolved")
        query = query.where(Alert.state == state)
    if model:
        query = query.where(ModelRow.name == model)
    if since:
        try:
            query = query.where(Alert.opened_at >= parse_ts(since))
        except (ValueError, TypeError):
            raise _invalid("since", "not an RFC 3339 time") from None
    if after is not None:
        query = query.where(Alert.seq < after)
    rows = session.execute(query.order_by(Alert.seq.desc()).limit(limit + 1)).all()
    more = len(rows) > limit
    rows = rows[:limit]
    items = [lifecycle.alert_dict(session, a, name) for a, name in rows]
    return items, (rows[-1][0].seq if more and rows else None)


def get_alert(*, session: Session, project_id: int, alert_id: str) -> Alert:
    """An alert of the project, or 404."""
    alert = session.get(Alert, alert_id)
    if alert is None or alert.project_id != project_id:
        raise Problem(404, f"no alert {alert_id!r} in this project")
    return alert


def create_webhook(
    *, session: Session, project_id: int, url: str, allow_private: bool, own: tuple[str, int]
) -> Webhook:
    """A new destination with a generated secret (returned once)."""
    try:
        urls.check(url, allow_private=allow_private, own=own)
    except urls.UnsafeUrl as exc:
        raise _invalid("url", str(exc)) from None
    hook = Webhook(
        id="whk_" + secrets.token_hex(8),
        project_id=project_id,
        url=url,
        secret=signing.new_secret(),
        created_at=now(),
    )
    session.add(hook)
    session.flush()
    return hook


def get_webhook(*, session: Session, project_id: int, hook_id: str) -> Webhook:
    """A webhook of the project, or 404."""
    hook = session.get(Webhook, hook_id)
    if hook is None or hook.project_id != project_id:
        raise Problem(404, f"no webhook {hook_id!r} in this project")
    return hook


def webhook_dict(hook: Webhook) -> dict[str, Any]:
    """A webhook without its secret."""
    return {
        "id": hook.id,
        "url": hook.url,
        "created_at": iso(hook.created_at),
        "disabled_at": iso(hook.disabled_at) if hook.disabled_at else None,
        "disabled_reason": hook.disabled_reason,
    }


def deliveries(*, session: Session, hook: Webhook, limit: int) -> list[dict[str, Any]]:
    """The delivery log of a webhook, newest first."""
    rows = session.scalars(
        select(Delivery)
        .where(Delivery.webhook_id == hook.id)
        .order_by(Delivery.id.desc())
        .limit(limit)
    )
    return [
        {
            "id": d.id,
            "event_id": d.event_id,
            "type": d.event_type,
            "alert_id": d.alert_id,
            "state": d.state,
            "attempts": d.attempts,
            "last_status": d.last_status,
            "last_error": d.last_error,
            "created_at": iso(d.created_at),
            "next_attempt_at": iso(d.next_attempt_at) if d.state == "pending" else None,
            "delivered_at": iso(d.delivered_at) if d.delivered_at else None,
        }
        for d in rows
    ]

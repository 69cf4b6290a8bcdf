"""Routes for rules, alerts and webhooks."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Query, Response

from belated.alerts import lifecycle, records, rules, webhooks
from belated.alerts.schemas import NoteCreate, RuleCreate, RuleRead, RuleUpdate, WebhookCreate
from belated.api.deps import (
    Admin,
    ModelDep,
    NowDep,
    Read,
    RuleDep,
    SessionDep,
    SettingsDep,
)
from belated.api.routes_models import decode_cursor, encode_cursor
from belated.errors import Problem

router = APIRouter(tags=["alerts"])


@router.post("/v1/models/{model}/rules", status_code=201, response_model=RuleRead)
def create_rule(
    body: RuleCreate, _caller: Admin, model: ModelDep, session: SessionDep, now: NowDep
) -> RuleRead:
    """Create an alert rule on a model."""
    rule = rules.create_rule(
        session=session, model=model, fields=body.model_dump(exclude_unset=True), now=now
    )
    return rules.rule_read(rule, model.name, now=now)


@router.get("/v1/models/{model}/rules")
def list_rules(
    _caller: Read, model: ModelDep, session: SessionDep, now: NowDep, retired: bool = False
) -> dict[str, Any]:
    """The model's rules; `retired=true` lists the retired ones too."""
    found = rules.list_rules(session=session, model=model, retired=retired)
    return {"items": [rules.rule_read(r, model.name, now=now) for r in found], "next_cursor": None}


@router.get("/v1/models/{model}/rules/{rule_id}", response_model=RuleRead)
def get_rule(_caller: Read, model: ModelDep, rule: RuleDep, now: NowDep) -> RuleRead:
    """One rule."""
    return rules.rule_read(rule, model.name, now=now)


@router.patch("/v1/models/{model}/rules/{rule_id}", response_model=RuleRead)
def update_rule(
    body: RuleUpdate,
    _caller: Admin,
    model: ModelDep,
    rule: RuleDep,
    session: SessionDep,
    now: NowDep,
) -> RuleRead:
    """Change a rule (for example mute it with muted_until)."""
    rule = rules.update_rule(
        session=session, rule=rule, fields=body.model_dump(exclude_unset=True), now=now
    )
    return rules.rule_read(rule, model.name, now=now)


@router.delete("/v1/models/{model}/rules/{rule_id}", status_code=204)
def delete_rule(
    _caller: Admin, _model: ModelDep, rule: RuleDep, session: SessionDep, now: NowDep
) -> Response:
    """Retire a rule: it stops being evaluated and listed; its alerts and breaches stay."""
    # `_model` before `rule` keeps the documented parameter order: model, then rule_id
    rules.retire_rule(session=session, rule=rule, now=now)
    return Response(status_code=204)


@router.get("/v1/alerts")
def list_alerts(
    caller: Read,
    session: SessionDep,
    state: str | None = None,
    model: str | None = None,
    since: str | None = None,
    cursor: str | None = None,
    limit: int = Query(50, ge=1, le=500),
) -> dict[str, Any]:
    """Alerts with their breaches, newest first; `state` takes raised, noted, cleared or a
    comma list of them."""
    raw = decode_cursor(cursor)
    if raw is not None and not raw.isdigit():
        raise Problem(422, "the cursor is not one this API gave out")
    items, last = records.list_alerts(
        session=session,
        project_id=caller.project_id,
        state=state,
        model=model,
        since=since,
        after=int(raw) if raw else None,
        limit=limit,
    )
    return {"items": items, "next_cursor": encode_cursor(str(last)) if last else None}


@router.get("/v1/alerts/{alert_id}")
def get_alert(alert_id: str, caller: Read, session: SessionDep) -> dict[str, Any]:
    """One alert with its breaches."""
    alert = records.get_alert(session=session, project_id=caller.project_id, alert_id=alert_id)
    return lifecycle.alert_dict(session, alert)


@router.post("/v1/alerts/{alert_id}/note")
def note_alert(
    alert_id: str, body: NoteCreate, caller: Admin, session: SessionDep, now: NowDep
) -> dict[str, Any]:
    """Say something about an alert: who and what are kept, and a raised alert is noted."""
    alert = records.get_alert(session=session, project_id=caller.project_id, alert_id=alert_id)
    author = lifecycle.author_of(session, caller.token_id)
    return lifecycle.alert_dict(session, lifecycle.note(session, alert, body.text, author, now))


@router.post("/v1/webhooks", status_code=201)
def create_webhook(
    body: WebhookCreate, caller: Admin, session: SessionDep, settings: SettingsDep, now: NowDep
) -> dict[str, Any]:
    """Add a destination; the answer carries its secret, shown this once."""
    hook = webhooks.create_webhook(
        session=session,
        project_id=caller.project_id,
        url=body.url,
        allow_private=settings.webhook_private,
        own=(settings.host, settings.port),
        now=now,
    )
    return {**webhooks.webhook_dict(hook), "secret": hook.secret}


@router.get("/v1/webhooks")
def list_webhooks(caller: Admin, session: SessionDep) -> dict[str, Any]:
    """The project's webhooks (without secrets)."""
    hooks = webhooks.list_webhooks(session=session, project_id=caller.project_id)
    return {"items": [webhooks.webhook_dict(h) for h in hooks], "next_cursor": None}


@router.delete("/v1/webhooks/{hook_id}", status_code=204)
def delete_webhook(hook_id: str, caller: Admin, session: SessionDep) -> Response:
    """Remove a destination and its delivery log."""
    hook = webhooks.get_webhook(session=session, project_id=caller.project_id, hook_id=hook_id)
    webhooks.delete_webhook(session=session, hook=hook)
    return Response(status_code=204)


@router.get("/v1/webhooks/{hook_id}/deliveries")
def list_deliveries(
    hook_id: str, caller: Admin, session: SessionDep, limit: int = Query(100, ge=1, le=1000)
) -> dict[str, Any]:
    """The delivery log of a webhook."""
    hook = webhooks.get_webhook(session=session, project_id=caller.project_id, hook_id=hook_id)
    return {
        "items": webhooks.deliveries(session=session, hook=hook, limit=limit),
        "next_cursor": None,
    }

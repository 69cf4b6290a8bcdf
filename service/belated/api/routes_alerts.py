"""Routes for rules, alerts and webhooks."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Query, Request, Response

from belated.alerts import lifecycle, service
from belated.alerts.schemas import RuleCreate, RuleRead, RuleUpdate, WebhookCreate
from belated.api.deps import Admin, Read, SessionDep
from belated.api.routes_models import decode_cursor, encode_cursor
from belated.clock import now
from belated.errors import Problem
from belated.store import models

router = APIRouter(tags=["alerts"])


@router.post("/v1/models/{model}/rules", status_code=201, response_model=RuleRead)
def create_rule(model: str, body: RuleCreate, who: Admin, session: SessionDep) -> RuleRead:
    """Create an alert rule on a model."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    rule = service.create_rule(
        session=session, model=row, fields=body.model_dump(exclude_unset=True)
    )
    return service.rule_read(rule, row.name)


@router.get("/v1/models/{model}/rules")
def list_rules(model: str, who: Read, session: SessionDep) -> dict[str, Any]:
    """The model's rules."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    return {
        "items": [
            service.rule_read(r, row.name) for r in service.list_rules(session=session, model=row)
        ],
        "next_cursor": None,
    }


@router.get("/v1/models/{model}/rules/{rule_id}", response_model=RuleRead)
def get_rule(model: str, rule_id: str, who: Read, session: SessionDep) -> RuleRead:
    """One rule."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    return service.rule_read(
        service.get_rule(session=session, model=row, rule_id=rule_id), row.name
    )


@router.patch("/v1/models/{model}/rules/{rule_id}", response_model=RuleRead)
def update_rule(
    model: str, rule_id: str, body: RuleUpdate, who: Admin, session: SessionDep
) -> RuleRead:
    """Change a rule (for example mute it with muted_until)."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    rule = service.get_rule(session=session, model=row, rule_id=rule_id)
    rule = service.update_rule(
        session=session, rule=rule, fields=body.model_dump(exclude_unset=True)
    )
    return service.rule_read(rule, row.name)


@router.delete("/v1/models/{model}/rules/{rule_id}", status_code=204)
def delete_rule(model: str, rule_id: str, who: Admin, session: SessionDep) -> Response:
    """Delete a rule with its alerts."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    service.delete_rule(
        session=session, rule=service.get_rule(session=session, model=row, rule_id=rule_id)
    )
    return Response(status_code=204)


@router.get("/v1/alerts")
def list_alerts(
    who: Read,
    session: SessionDep,
    state: str | None = None,
    model: str | None = None,
    since: str | None = None,
    cursor: str | None = None,
    limit: int = Query(50, ge=1, le=500),
) -> dict[str, Any]:
    """Alerts with their breaches, newest first."""
    raw = decode_cursor(cursor)
    if raw is not None and not raw.isdigit():
        raise Problem(422, "the cursor is not one this API gave out")
    items, last = service.list_alerts(
        session=session,
        project_id=who.project_id,
        state=state,
        model=model,
        since=since,
        after=int(raw) if raw else None,
        limit=limit,
    )
    return {"items": items, "next_cursor": encode_cursor(str(last)) if last else None}


@router.get("/v1/alerts/{alert_id}")
def get_alert(alert_id: str, who: Read, session: SessionDep) -> dict[str, Any]:
    """One alert with its breaches."""
    alert = service.get_alert(session=session, project_id=who.project_id, alert_id=alert_id)
    return lifecycle.alert_dict(session, alert)


@router.post("/v1/alerts/{alert_id}/acknowledge")
def acknowledge(alert_id: str, who: Admin, session: SessionDep) -> dict[str, Any]:
    """Acknowledge an open alert."""
    alert = service.get_alert(session=session, project_id=who.project_id, alert_id=alert_id)
    return lifecycle.alert_dict(session, lifecycle.acknowledge(session, alert, now()))


@router.post("/v1/webhooks", status_code=201)
def create_webhook(
    body: WebhookCreate, who: Admin, session: SessionDep, request: Request
) -> dict[str, Any]:
    """Add a destination; the answer carries its secret, shown this once."""
    settings = request.app.state.settings
    hook = service.create_webhook(
        session=session,
        project_id=who.project_id,
        url=body.url,
        allow_private=settings.webhook_private,
        own=(settings.host, settings.port),
    )
    return {**service.webhook_dict(hook), "secret": hook.secret}


@router.get("/v1/webhooks")
def list_webhooks(who: Admin, session: SessionDep) -> dict[str, Any]:
    """The project's webhooks (without secrets)."""
    from sqlalchemy import select

    from belated.alerts.tables import Webhook

    hooks = session.scalars(
        select(Webhook).where(Webhook.project_id == who.project_id).order_by(Webhook.created_at)
    )
    return {"items": [service.webhook_dict(h) for h in hooks], "next_cursor": None}


@router.delete("/v1/webhooks/{hook_id}", status_code=204)
def delete_webhook(hook_id: str, who: Admin, session: SessionDep) -> Response:
    """Remove a destination and its delivery log."""
    hook = service.get_webhook(session=session, project_id=who.project_id, hook_id=hook_id)
    session.delete(hook)
    return Response(status_code=204)


@router.get("/v1/webhooks/{hook_id}/deliveries")
def list_deliveries(
    hook_id: str, who: Admin, session: SessionDep, limit: int = Query(100, ge=1, le=1000)
) -> dict[str, Any]:
    """The delivery log of a webhook."""
    hook = service.get_webhook(session=session, project_id=who.project_id, hook_id=hook_id)
    return {
        "items": service.deliveries(session=session, hook=hook, limit=limit),
        "next_cursor": None,
    }

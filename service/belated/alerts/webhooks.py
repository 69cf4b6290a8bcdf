"""Webhooks of a project: create (the secret is shown once), list, delete, delivery log."""

from __future__ import annotations

import secrets
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import signing, urls
from belated.alerts.tables import Delivery, Webhook
from belated.clock import clock
from belated.errors import NotFound, invalid_field
from belated.timeutil import iso


def create_webhook(
    *,
    session: Session,
    project_id: int,
    url: str,
    allow_private: bool,
    own: tuple[str, int],
    now: datetime | None = None,
) -> Webhook:
    """A new destination with a generated secret (returned once), created `now`."""
    try:
        urls.check(url, allow_private=allow_private, own=own)
    except urls.UnsafeUrl as exc:
        raise invalid_field("url", str(exc)) from None
    hook = Webhook(
        id="whk_" + secrets.token_hex(8),
        project_id=project_id,
        url=url,
        secret=signing.new_secret(),
        created_at=now or clock.now(),
    )
    session.add(hook)
    session.flush()
    return hook


def get_webhook(*, session: Session, project_id: int, hook_id: str) -> Webhook:
    """A webhook of the project; NotFound otherwise."""
    hook = session.get(Webhook, hook_id)
    if hook is None or hook.project_id != project_id:
        raise NotFound("webhook", hook_id)
    return hook


def list_webhooks(*, session: Session, project_id: int) -> list[Webhook]:
    """The project's webhooks, oldest first."""
    query = select(Webhook).where(Webhook.project_id == project_id).order_by(Webhook.created_at)
    return list(session.scalars(query))


def delete_webhook(*, session: Session, hook: Webhook) -> None:
    """Remove a destination; its delivery log goes with it."""
    session.delete(hook)


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

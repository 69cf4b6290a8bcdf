"""Deliver outbox rows: signed POSTs, exponential backoff with jitter, for 24 hours.

Delivery is at least once: a row is marked delivered only after a 2xx, so a crash between
the POST and the commit sends it again with the same webhook-id, which receivers use to
deduplicate. Events of one alert go out in order: a later one waits while an earlier one
to the same webhook is still pending.
"""

from __future__ import annotations

import logging
import random
import time
from datetime import datetime, timedelta
from typing import Any

import httpx
from sqlalchemy import select, update
from sqlalchemy.orm import Session, sessionmaker

from belated.alerts import signing, urls
from belated.alerts.tables import Delivery, Webhook
from belated.clock import now
from belated.config import Settings
from belated.store.db import transaction
from belated.timeutil import to_utc

log = logging.getLogger(__name__)
BASE_DELAY = 5.0
MAX_DELAY = 3600.0
BATCH = 100
TIMEOUT = 10.0


def backoff(attempts: int, retry_after: float | None = None) -> float:
    """Seconds before the next attempt: exponential with full jitter, or Retry-After."""
    if retry_after is not None:
        return min(MAX_DELAY, max(1.0, retry_after))
    ceiling = min(MAX_DELAY, BASE_DELAY * 2 ** max(0, attempts - 1))
    return float(ceiling / 2 + random.uniform(0, ceiling / 2))


def _retry_after(response: httpx.Response) -> float | None:
    value = response.headers.get("retry-after")
    if value is None:
        return None
    try:
        return float(value)
    except ValueError:
        return None


def _due(session: Session, at: datetime) -> list[tuple[Delivery, Webhook]]:
    rows = session.execute(
        select(Delivery, Webhook)
        .join(Webhook, Webhook.id == Delivery.webhook_id)
        .where(Delivery.state == "pending")
        .order_by(Delivery.id)
        .limit(BATCH * 5)
    ).all()
    out, blocked = [], set()
    for d, hook in rows:
        key = (d.webhook_id, d.alert_id)
        if key in blocked:
            continue
        blocked.add(key)  # only the oldest pending event of an alert per webhook goes out
        if to_utc(d.next_attempt_at) <= at:
            out.append((d, hook))
    return out[:BATCH]


def deliver_due(
    factory: sessionmaker[Session], settings: Settings, client: httpx.Client | None = None
) -> dict[str, int]:
    """Attempt every due delivery once."""
    counts = {"delivered": 0, "retrying": 0, "expired": 0, "disabled": 0}
    own = (settings.host, settings.port)
    with transaction(factory) as session:
        due = [
            (d.id, hook.id, hook.url, hook.secret, d.event_id, d.payload)
            for d, hook in _due(session, now())
        ]
    if not due:
        return counts
    own_client = client is None
    client = client or httpx.Client(timeout=TIMEOUT, follow_redirects=False)
    gone: set[str] = set()
    try:
        for delivery_id, hook_id, url, secret, event_id, payload in due:
            if hook_id in gone:  # disabled by a 410 earlier in this batch
                continue
            outcome = _attempt(
                client, url, secret, event_id, payload, settings.webhook_private, own
            )
            result = _settle(factory, delivery_id, hook_id, outcome)
            if result == "disabled":
                gone.add(hook_id)
            counts[result] += 1
    finally:
        if own_client:
            client.close()
    return counts


def _attempt(
    client: httpx.Client,
    url: str,
    secret: str,
    event_id: str,
    payload: str,
    allow_private: bool,
    own: tuple[str, int],
) -> dict[str, Any]:
    try:
        urls.check(url, allow_private=allow_private, own=own)
    except urls.UnsafeUrl as exc:
        log.warning("webhook delivery refused: %s", exc)
        return {"status": None, "error": f"refused: {exc}", "retry_after": None}
    # The header carries the real time of the attempt, which receivers check against their
    # own clocks; the service clock (which tests may freeze) only schedules attempts.
    stamp = int(time.time())
    try:
        response = client.post(
            url, content=payload.encode(), headers=signing.headers(secret, event_id, stamp, payload)
        )
    except httpx.HTTPError as exc:
        return {"status": None, "error": f"{type(exc).__name__}: {exc}"[:500], "retry_after": None}
    return {
        "status": response.status_code,
        "error": None if response.is_success else f"HTTP {response.status_code}",
        "retry_after": _retry_after(response),
    }


def _settle(
    factory: sessionmaker[Session], delivery_id: int, hook_id: str, outcome: dict[str, Any]
) -> str:
    at = now()
    with transaction(factory) as session:
        d = session.get(Delivery, delivery_id)
        if d is None or d.state != "pending":
            return "delivered"
        d.attempts += 1
        d.last_status, d.last_error = outcome["status"], outcome["error"]
        status = outcome["status"]
        if status is not None and 200 <= status < 300:
            d.state, d.delivered_at = "delivered", at
            return "delivered"
        if status == 410:
            hook = session.get(Webhook, hook_id)
            if hook is not None and hook.disabled_at is None:
                hook.disabled_at, hook.disabled_reason = at, "the receiver answered 410 Gone"
            session.execute(
                update(Delivery)
                .where(Delivery.webhook_id == hook_id, Delivery.state == "pending")
                .values(state="disabled", last_error="endpoint disabled after 410 Gone")
            )
            return "disabled"
        if to_utc(d.expires_at) <= at:
            d.state = "expired"
            return "expired"
        d.next_attempt_at = at + timedelta(seconds=backoff(d.attempts, outcome["retry_after"]))
        return "retrying"


def backlog(conn: Any) -> int:
    """Pending deliveries (for /healthz and /metrics)."""
    from sqlalchemy import func

    return int(
        conn.execute(
            select(func.count()).select_from(Delivery).where(Delivery.state == "pending")
        ).scalar()
        or 0
    )

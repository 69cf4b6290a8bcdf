"""Alerts of a project as the API lists and reads them (the lifecycle moves them)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import lifecycle
from belated.alerts.tables import Alert
from belated.errors import NotFound, invalid_field
from belated.store.tables import ModelRow
from belated.timeutil import parse_ts
from belated.zones import DEFAULT_ZONE


def list_alerts(
    *,
    session: Session,
    project_id: int,
    state: str | None,
    model: str | None,
    since: str | None,
    after: int | None,
    limit: int,
    public_url: str | None = None,
) -> tuple[list[dict[str, Any]], int | None]:
    """Alerts of the project, newest first, with their breaches; cursor is the last seq.

    `state` is one state or a comma list of them (`raised,noted`: every active alert)."""
    query = (
        select(Alert, ModelRow.name, ModelRow.time_zone)
        .join(ModelRow, ModelRow.id == Alert.model_id)
        .where(Alert.project_id == project_id)
    )
    if state:
        wanted = [s.strip() for s in state.split(",") if s.strip()]
        if not wanted or any(s not in lifecycle.STATES for s in wanted):
            raise invalid_field(
                "state", "must be raised, noted or cleared (or a comma list of them)"
            )
        query = query.where(Alert.state.in_(wanted))
    if model:
        query = query.where(ModelRow.name == model)
    if since:
        try:
            query = query.where(Alert.raised_at >= parse_ts(since))
        except (ValueError, TypeError):
            raise invalid_field("since", "not an RFC 3339 time") from None
    if after is not None:
        query = query.where(Alert.seq < after)
    rows = session.execute(query.order_by(Alert.seq.desc()).limit(limit + 1)).all()
    more = len(rows) > limit
    rows = rows[:limit]
    items = [
        lifecycle.alert_dict(session, a, name, public_url, zone or DEFAULT_ZONE)
        for a, name, zone in rows
    ]
    return items, (rows[-1][0].seq if more and rows else None)


def get_alert(*, session: Session, project_id: int, alert_id: str) -> Alert:
    """An alert of the project; NotFound otherwise."""
    alert = session.get(Alert, alert_id)
    if alert is None or alert.project_id != project_id:
        raise NotFound("alert", alert_id)
    return alert

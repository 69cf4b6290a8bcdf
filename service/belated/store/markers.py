"""Markers: dated notes on a model's timeline (create, list, delete)."""

from __future__ import annotations

import secrets
from datetime import datetime

from sqlalchemy import delete as sql_delete
from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.errors import NotFound
from belated.store.tables import Marker, ModelRow


def create(
    *, session: Session, model: ModelRow, at: datetime, text: str, author: str, now: datetime
) -> Marker:
    """Keep a marker at `at` on the model's timeline, written by `author` at `now`."""
    row = Marker(
        id="mrk_" + secrets.token_hex(8),
        model_id=model.id,
        at=at,
        text=text,
        author=author[:160],
        created_at=now,
    )
    session.add(row)
    session.flush()
    return row


def list_(
    *,
    session: Session,
    model: ModelRow,
    start: datetime | None = None,
    end: datetime | None = None,
) -> list[Marker]:
    """The model's markers in [start, end) (either may be open), oldest first."""
    query = select(Marker).where(Marker.model_id == model.id)
    if start is not None:
        query = query.where(Marker.at >= start)
    if end is not None:
        query = query.where(Marker.at < end)
    return list(session.scalars(query.order_by(Marker.at, Marker.id)))


def delete(*, session: Session, model: ModelRow, marker_id: str) -> None:
    """Remove a marker of the model; NotFound when it has none by that id."""
    result = session.execute(
        sql_delete(Marker).where(Marker.id == marker_id, Marker.model_id == model.id)
    )
    if not getattr(result, "rowcount", 0):
        raise NotFound("marker", marker_id, where=f"on model {model.name!r}")

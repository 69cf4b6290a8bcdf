"""Routes for markers: dated notes on a model's timeline (add, list, remove)."""

from __future__ import annotations

from datetime import datetime

from fastapi import APIRouter, Response

from belated.alerts.lifecycle import author_of
from belated.api.deps import Admin, ModelDep, NowDep, Read, SessionDep
from belated.api.marker_schemas import MarkerCreate, MarkerPage, MarkerRead
from belated.errors import invalid_field
from belated.store import markers
from belated.store.tables import Marker
from belated.timeutil import parse_ts, to_utc

router = APIRouter(prefix="/v1/models/{model}/markers", tags=["markers"])


def marker_read(row: Marker, model_name: str) -> MarkerRead:
    """A marker as the API answers it."""
    return MarkerRead(
        id=row.id,
        model=model_name,
        at=to_utc(row.at),
        text=row.text,
        who=row.author,
        created_at=to_utc(row.created_at),
    )


@router.post("", status_code=201, response_model=MarkerRead)
def create_marker(
    body: MarkerCreate, caller: Admin, model: ModelDep, session: SessionDep, now: NowDep
) -> MarkerRead:
    """Mark something that happened to the model ("supplier change in the north")."""
    row = markers.create(
        session=session,
        model=model,
        at=body.at,
        text=body.text,
        author=author_of(session, caller.token_id),
        now=now,
    )
    return marker_read(row, model.name)


@router.get("", response_model=MarkerPage)
def list_markers(
    _caller: Read,
    model: ModelDep,
    session: SessionDep,
    start: str | None = None,
    end: str | None = None,
) -> MarkerPage:
    """The model's markers in [start, end) (both optional), oldest first."""
    lo, hi = _time("start", start), _time("end", end)
    if lo is not None and hi is not None and lo >= hi:
        raise invalid_field("start", "must be before 'end'")
    rows = markers.list_(session=session, model=model, start=lo, end=hi)
    return MarkerPage(items=[marker_read(r, model.name) for r in rows])


@router.delete("/{marker_id}", status_code=204)
def delete_marker(marker_id: str, _caller: Admin, model: ModelDep, session: SessionDep) -> Response:
    """Remove a marker."""
    markers.delete(session=session, model=model, marker_id=marker_id)
    return Response(status_code=204)


def _time(field: str, value: str | None) -> datetime | None:
    if not value:
        return None
    try:
        return parse_ts(value)
    except (ValueError, TypeError, OverflowError):
        raise invalid_field(field, "not an RFC 3339 time") from None

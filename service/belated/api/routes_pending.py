"""GET /v1/models/{model}/pending: labels waiting for their prediction, with their age."""

from __future__ import annotations

from fastapi import APIRouter, Query

from belated.api.deps import ModelDep, NowDep, Read, SessionDep
from belated.api.routes_models import decode_cursor, encode_cursor
from belated.api.schemas import PendingPage, PendingRead
from belated.errors import Problem
from belated.store import pending

router = APIRouter(prefix="/v1/models/{model}", tags=["labels"])


@router.get("/pending", response_model=PendingPage)
def list_pending(
    _caller: Read,
    model: ModelDep,
    session: SessionDep,
    now: NowDep,
    cursor: str | None = None,
    limit: int = Query(100, ge=1, le=1000),
) -> PendingPage:
    """Labels waiting for their prediction, oldest first, with their age in hours and when
    the jobs drop them (after the model's keep_raw_days)."""
    after = decode_cursor(cursor)
    if after is not None and not (after.isascii() and after.isdigit() and len(after) <= 18):
        raise Problem(
            422,
            "the cursor is not one this API gave out",
            errors=[{"index": None, "field": "cursor", "reason": "malformed"}],
        )
    items, last = pending.list_(
        session=session, model=model, now=now, after=int(after) if after else None, limit=limit
    )
    return PendingPage(
        items=[PendingRead.model_validate(i) for i in items],
        next_cursor=encode_cursor(str(last) if last is not None else None),
    )

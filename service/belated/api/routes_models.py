"""Routes for models: create, list, read, change, delete."""

from __future__ import annotations

import base64
from typing import Any

from fastapi import APIRouter, Query, Request, Response

from belated.api.deps import Admin, ModelDep, NowDep, Read, SessionDep, SettingsDep
from belated.api.schemas import ModelCreate, ModelPage, ModelRead, ModelUpdate
from belated.errors import Problem
from belated.metrics.load import ensure_fresh
from belated.store import model_registry, raw_retention, retention
from belated.store.tables import ModelRow
from belated.timeutil import to_utc

router = APIRouter(prefix="/v1/models", tags=["models"])


def read_model(session: Any, model: ModelRow) -> ModelRead:
    """A model with its counts, as the API answers it."""
    return ModelRead(
        name=model.name,
        kind=model.kind,
        classes=model.classes,
        positive=model.positive,
        threshold=model.threshold,
        label_delay_days=model.label_delay_days,
        min_coverage=model.min_coverage,
        negative_after_days=model.negative_after_days,
        segment_keys=model.segment_keys,
        reference=model.reference,
        time_zone=model.time_zone or "UTC",
        keep_raw_days=retention.keep_raw_days(model),
        keep_raw_days_default=model.keep_raw_days is None,
        source=model.source or "http",
        raw_kept_from=None
        if model.raw_from_hour is None
        else raw_retention.day_of(model.raw_from_hour),
        created_at=to_utc(model.created_at),
        updated_at=to_utc(model.updated_at),
        **model_registry.counts(session=session, model=model),
    )


def encode_cursor(value: str | None) -> str | None:
    """An opaque cursor."""
    return base64.urlsafe_b64encode(value.encode()).decode() if value else None


def decode_cursor(value: str | None) -> str | None:
    """Read an opaque cursor; a broken one is a 422."""
    if not value:
        return None
    try:
        decoded = base64.urlsafe_b64decode(value.encode("ascii"))
        if base64.urlsafe_b64encode(decoded).decode() != value or not decoded:
            raise ValueError("not a cursor")
        return decoded.decode()
    except (ValueError, UnicodeError):
        raise Problem(
            422,
            "the cursor is not one this API gave out",
            errors=[{"index": None, "field": "cursor", "reason": "malformed"}],
        ) from None


@router.post("", status_code=201, response_model=ModelRead)
def create_model(body: ModelCreate, caller: Admin, session: SessionDep, now: NowDep) -> ModelRead:
    """Create a model."""
    model = model_registry.create(
        session=session,
        project_id=caller.project_id,
        fields=body.model_dump(exclude_unset=False),
        now=now,
    )
    return read_model(session, model)


@router.get("", response_model=ModelPage)
def list_models(
    caller: Read,
    session: SessionDep,
    cursor: str | None = None,
    limit: int = Query(50, ge=1, le=500),
) -> ModelPage:
    """List the project's models."""
    rows, last = model_registry.list_(
        session=session, project_id=caller.project_id, after=decode_cursor(cursor), limit=limit
    )
    return ModelPage(items=[read_model(session, m) for m in rows], next_cursor=encode_cursor(last))


@router.get("/{model}", response_model=ModelRead)
def get_model(_caller: Read, model: ModelDep, session: SessionDep) -> ModelRead:
    """One model with its stored counts."""
    return read_model(session, model)


@router.patch("/{model}", response_model=ModelRead)
def update_model(
    body: ModelUpdate,
    _caller: Admin,
    model: ModelDep,
    session: SessionDep,
    now: NowDep,
    settings: SettingsDep,
    request: Request,
) -> ModelRead:
    """Change a model's settings (threshold changes are kept in history)."""
    request.app.state.lookups.clear_after_commit(session)
    fields = body.model_dump(exclude_unset=True)
    for key in ("threshold", "label_delay_days", "min_coverage", "time_zone"):
        if key in fields and fields[key] is None:
            raise Problem(
                422,
                f"'{key}' cannot be null",
                errors=[{"index": None, "field": key, "reason": "cannot be null"}],
            )
    if body.reference is not None:  # checked against rollups that hold every write so far
        ref = body.reference
        lo, hi = int(ref.start.timestamp() // 3600), int(ref.end.timestamp() // 3600) + 24
        ensure_fresh(session, model, lo, hi, settings.max_segment_values)
    updated = model_registry.update(session=session, model=model, fields=fields, now=now)
    return read_model(session, updated)


@router.delete("/{model}", status_code=204)
def delete_model(
    _caller: Admin, model: ModelDep, session: SessionDep, request: Request
) -> Response:
    """Delete a model and all its data."""
    request.app.state.lookups.clear_after_commit(session)
    model_registry.delete(session=session, model=model)
    return Response(status_code=204)

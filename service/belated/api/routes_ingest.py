"""Routes that take predictions and labels, all or nothing.

A live system sends many small requests, so this path is kept short: one dependency
resolves the caller, the body and the model (the token and the model usually from the
caches of api/lookups.py, without leaving the event loop); a small predictions batch is
validated on the event loop and stored with the other small batches of the moment
(store/grouped.py); anything else takes one hop to a worker thread for its validation and
transaction. The answer is sent once the write is committed.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass
from datetime import datetime
from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Depends, Request, Response
from sqlalchemy.orm import Session

from belated.api.deps import (
    JsonBody,
    ModelRefDep,
    NowDep,
    SettingsDep,
    in_transaction,
    scope,
)
from belated.api.lookups import ModelRef
from belated.api.schemas import LabelsAnswer, PredictionsAnswer
from belated.config import Settings
from belated.errors import Invalid, Problem
from belated.ingest.validate import validate_labels, validate_predictions
from belated.store import grouped, labels, predictions
from belated.store.keys import Principal

router = APIRouter(prefix="/v1/models/{model}", tags=["ingest"])


@dataclass(frozen=True, slots=True)
class Call:
    """What an ingest request brings: its body, model, settings and clock reading."""

    body: Any
    model: ModelRef
    settings: Settings
    now: datetime


# In this order: the caller (401, 403), the body (400 when it is not JSON), then the model
# (404), as the other routes do.
async def ingest_call(
    _caller: Annotated[Principal, scope("ingest")],
    body: JsonBody,
    model: ModelRefDep,
    settings: SettingsDep,
    now: NowDep,
) -> Call:
    """Everything an ingest route needs, resolved once; a lake-fed model takes none."""
    if model.source == "lake":
        raise Problem(
            409,
            f'model {model.name!r} is lake-fed (source "lake"): it takes no predictions or'
            " labels over HTTP; upload its rollup rows with PUT"
            f" /v1/models/{model.name}/rollups (belated lake run) instead",
            title="Lake-fed model",
        )
    return Call(body, model, settings, now)


CallDep = Annotated[Call, Depends(ingest_call)]


async def _grouped(request: Request, batch: grouped.Batch) -> dict[str, int]:
    """Store a small batch with the others of the moment (store/grouped.py)."""
    writer: grouped.GroupWriter = request.app.state.group_writer
    try:
        done = writer.submit(batch)
    except grouped.Busy:
        raise Problem(
            503,
            "the store is not keeping up with the writes; retry after the given seconds",
            headers={"Retry-After": "1"},
        ) from None
    return await asyncio.wrap_future(done)


def _json(answer: dict[str, int]) -> Response:
    return Response(orjson.dumps(answer), media_type="application/json")


@router.post("/predictions", response_model=PredictionsAnswer)
async def post_predictions(call: CallDep, request: Request) -> Response:
    """Store a batch of predictions; a repeat with the same content is a duplicate."""
    body = call.body
    sent = body.get("predictions") if isinstance(body, dict) else None
    try:
        answer = await _store_predictions(call, request, sent)
    except Invalid as exc:
        raise _request_indices(exc, sent) from None
    request.app.state.counters.add("predictions", answer["accepted"])
    return _json(answer)


def _request_indices(exc: Invalid, sent: Any) -> Invalid:
    """The store names a refused prediction by its place among the batch's distinct ids
    (store/raw_retention.py); the request's own index is that of its first copy."""
    if not isinstance(sent, list) or not any("id" in e for e in exc.errors or []):
        return exc
    first: dict[str, int] = {}
    for i, item in enumerate(sent):
        pid = item.get("id") if isinstance(item, dict) else None
        first.setdefault(str(pid), i)
    errors = [
        {**e, "index": first.get(str(e["id"]), e["index"])} if "id" in e else e
        for e in exc.errors or []
    ]
    return Invalid(errors)


async def _store_predictions(call: Call, request: Request, sent: Any) -> dict[str, int]:
    body, model, settings, now = call.body, call.model, call.settings, call.now
    if isinstance(sent, list) and len(sent) <= grouped.SMALL_BATCH:
        items = validate_predictions(body, model.spec, now=now, max_batch=settings.max_batch)
        answer = await _grouped(request, grouped.Batch(model.id, items, len(sent), now))
    else:

        def work(session: Session) -> dict[str, int]:
            items = validate_predictions(body, model.spec, now=now, max_batch=settings.max_batch)
            return predictions.ingest(
                session=session,
                model_id=model.id,
                preds=items,
                batch_size=len(body["predictions"]),
                now=now,
            )

        answer = await in_transaction(request, work)
    return answer


@router.post("/labels", response_model=LabelsAnswer)
async def post_labels(call: CallDep, request: Request) -> Response:
    """Store a batch of labels; unknown ids wait as pending until their prediction arrives."""
    body, model, settings, now = call.body, call.model, call.settings, call.now
    sent = body.get("labels") if isinstance(body, dict) else None
    if isinstance(sent, list) and len(sent) <= grouped.SMALL_BATCH:
        items = validate_labels(body, model.spec, now=now, max_batch=settings.max_batch)
        answer = await _grouped(request, grouped.Batch(model.id, items, len(sent), now, "labels"))
        request.app.state.counters.add("labels", len(items))
        return _json(answer)

    def work(session: Session) -> tuple[dict[str, int], int]:
        items = validate_labels(body, model.spec, now=now, max_batch=settings.max_batch)
        answer = labels.ingest(session=session, model_id=model.id, items=items, now=now)
        return answer, len(items)

    answer, n = await in_transaction(request, work)
    request.app.state.counters.add("labels", n)
    return _json(answer)

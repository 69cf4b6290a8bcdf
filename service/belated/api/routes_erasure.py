"""Erasure by id: a data-protection request removes everything stored under some ids."""

from __future__ import annotations

from fastapi import APIRouter

from belated.api.deps import Admin, JsonBody, ModelDep, NowDep, SessionDep, SettingsDep
from belated.api.schemas import ErasureAnswer
from belated.ingest.validate import validate_ids
from belated.store import erasure

router = APIRouter(prefix="/v1/models/{model}", tags=["erasure"])


@router.delete("/predictions", response_model=ErasureAnswer)
def erase_predictions(
    _caller: Admin,
    model: ModelDep,  # the model (404) before the body (400), as the other DELETE routes
    body: JsonBody,
    session: SessionDep,
    settings: SettingsDep,
    now: NowDep,
) -> ErasureAnswer:
    """Erase predictions by id (`{"ids": [...]}`, up to BELATED_MAX_BATCH): their labels,
    label history and pending labels go too, and the windows are recounted without them.
    Answers the rows removed and the ids of which nothing was stored."""
    ids = validate_ids(body, max_batch=settings.max_batch)
    done = erasure.erase(
        session=session, model=model, ids=ids, now=now, max_values=settings.max_segment_values
    )
    return ErasureAnswer.model_validate(done.answer())

"""Routes that take predictions and labels, all or nothing."""

from __future__ import annotations

from fastapi import APIRouter, Request

from belated.api.deps import Ingest, JsonBody, SessionDep
from belated.api.schemas import LabelsAnswer, PredictionsAnswer
from belated.clock import now
from belated.ingest.validate import validate_labels, validate_predictions
from belated.store import labels, models, predictions

router = APIRouter(prefix="/v1/models/{model}", tags=["ingest"])


@router.post("/predictions", response_model=PredictionsAnswer)
def post_predictions(
    model: str, who: Ingest, session: SessionDep, body: JsonBody, request: Request
) -> PredictionsAnswer:
    """Store a batch of predictions; a repeat with the same content is a duplicate."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    settings = request.app.state.settings
    items = validate_predictions(body, models.spec_of(row), now=now(), max_batch=settings.max_batch)
    answer = predictions.ingest(
        session=session, model_id=row.id, preds=items, batch_size=len(body["predictions"])
    )
    request.app.state.counters.add("predictions", answer["accepted"])
    return PredictionsAnswer(**answer)


@router.post("/labels", response_model=LabelsAnswer)
def post_labels(
    model: str, who: Ingest, session: SessionDep, body: JsonBody, request: Request
) -> LabelsAnswer:
    """Store a batch of labels; unknown ids wait as pending until their prediction arrives."""
    row = models.get(session=session, project_id=who.project_id, name=model)
    settings = request.app.state.settings
    items = validate_labels(body, models.spec_of(row), now=now(), max_batch=settings.max_batch)
    answer = labels.ingest(session=session, model_id=row.id, items=items)
    request.app.state.counters.add("labels", len(items))
    return LabelsAnswer(**answer)

"""Routes that take predictions and labels, all or nothing."""

from __future__ import annotations

from fastapi import APIRouter, Request

from belated.api.deps import Ingest, JsonBody, ModelDep, NowDep, SessionDep, SettingsDep
from belated.api.schemas import LabelsAnswer, PredictionsAnswer
from belated.ingest.validate import validate_labels, validate_predictions
from belated.store import labels, model_registry, predictions

router = APIRouter(prefix="/v1/models/{model}", tags=["ingest"])


# The body is parsed (a 400 when it is not JSON) before the model is looked up, as ever.
@router.post("/predictions", response_model=PredictionsAnswer)
def post_predictions(
    _caller: Ingest,
    session: SessionDep,
    body: JsonBody,
    model: ModelDep,
    settings: SettingsDep,
    now: NowDep,
    request: Request,
) -> PredictionsAnswer:
    """Store a batch of predictions; a repeat with the same content is a duplicate."""
    spec = model_registry.spec_of(model)
    items = validate_predictions(body, spec, now=now, max_batch=settings.max_batch)
    answer = predictions.ingest(
        session=session,
        model_id=model.id,
        preds=items,
        batch_size=len(body["predictions"]),
        now=now,
    )
    request.app.state.counters.add("predictions", answer["accepted"])
    return PredictionsAnswer(**answer)


@router.post("/labels", response_model=LabelsAnswer)
def post_labels(
    _caller: Ingest,
    session: SessionDep,
    body: JsonBody,
    model: ModelDep,
    settings: SettingsDep,
    now: NowDep,
    request: Request,
) -> LabelsAnswer:
    """Store a batch of labels; unknown ids wait as pending until their prediction arrives."""
    spec = model_registry.spec_of(model)
    items = validate_labels(body, spec, now=now, max_batch=settings.max_batch)
    answer = labels.ingest(session=session, model_id=model.id, items=items, now=now)
    request.app.state.counters.add("labels", len(items))
    return LabelsAnswer(**answer)

"""The registry of a project's models: look up, list, create, change, delete, count."""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import delete as sql_delete
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.clock import clock
from belated.errors import Conflict, NotFound, invalid_field
from belated.ingest.validate import ModelSpec
from belated.store.dialect import is_postgres
from belated.store.rollup_tables import Rollup
from belated.store.tables import ModelRow, PendingLabel, Prediction, ThresholdChange
from belated.timeutil import from_db, iso, to_utc

DEFAULTS: dict[str, Any] = {
    "threshold": 0.5,
    "label_delay_days": 30.0,
    "min_coverage": 0.9,
    "negative_after_days": None,
    "segment_keys": None,
    "reference": None,
    "time_zone": "UTC",
    "source": "http",
}


def spec_of(model: ModelRow) -> ModelSpec:
    """The part of a model that validation needs."""
    return ModelSpec(model.kind, tuple(model.classes), model.positive, model.threshold)


def get(*, session: Session, project_id: int, name: str) -> ModelRow:
    """The model `name` of the project; NotFound when it has none of that name."""
    query = select(ModelRow).where(ModelRow.project_id == project_id, ModelRow.name == name)
    model = session.scalar(query)
    if model is None:
        raise NotFound("model named", name)
    return model


def list_(
    *, session: Session, project_id: int, after: str | None, limit: int
) -> tuple[list[ModelRow], str | None]:
    """A page of the project's models ordered by name, and the cursor of the next page."""
    query = select(ModelRow).where(ModelRow.project_id == project_id)
    if after:
        query = query.where(ModelRow.name > after)
    rows = list(session.scalars(query.order_by(ModelRow.name).limit(limit + 1)))
    more = len(rows) > limit
    rows = rows[:limit]
    return rows, (rows[-1].name if more and rows else None)


def create(
    *, session: Session, project_id: int, fields: dict[str, Any], now: datetime | None = None
) -> ModelRow:
    """Create a model (stamped `now`, the clock by default); a taken name is a Conflict."""
    taken = session.scalar(
        select(ModelRow.id).where(
            ModelRow.project_id == project_id, ModelRow.name == fields["name"]
        )
    )
    if taken is not None:
        raise Conflict(f"a model named {fields['name']!r} exists already")
    if fields.get("reference") is not None:
        raise invalid_field(
            "reference",
            "a new model has no settled labelled data to take as its reference; "
            "set it with PATCH once a settled period has labels",
        )
    values = {**DEFAULTS, **{k: v for k, v in fields.items() if v is not None}}
    _check_keep(
        values.get("keep_raw_days"), values["label_delay_days"], values["negative_after_days"]
    )
    stamp = now or clock.now()
    model = ModelRow(project_id=project_id, created_at=stamp, updated_at=stamp, **values)
    if not is_postgres(session):
        # SQLite hands out the largest row id plus one again after a deletion: never an
        # id whose rows a racing write may still leave behind (store/purge.py)
        from belated.store import purge

        last = session.scalar(select(func.max(ModelRow.id))) or 0
        model.id = max(last, purge.highest_tombstoned_id(session)) + 1
    session.add(model)
    session.flush()
    session.add(ThresholdChange(model_id=model.id, threshold=model.threshold, changed_at=stamp))
    return model


def update(
    *, session: Session, model: ModelRow, fields: dict[str, Any], now: datetime | None = None
) -> ModelRow:
    """Change settings (stamped `now`); a threshold change is recorded in the history.

    A setting the rollups depend on (implied negatives, segment keys) marks every hour of
    the model for aggregation from raw rows, so that stored rows never mix old and new.
    """
    from belated.store import refresh

    stamp = now or clock.now()
    if fields.get("reference") is not None:
        fields = {
            **fields,
            "reference": _checked_reference(session, model, fields["reference"], stamp),
        }
    _check_keep(
        fields.get("keep_raw_days", model.keep_raw_days),
        fields.get("label_delay_days", model.label_delay_days),
        fields.get("negative_after_days", model.negative_after_days),
    )
    reshape = any(
        key in _ROLLUP_SETTINGS and getattr(model, key) != value for key, value in fields.items()
    )
    for key, value in fields.items():
        setattr(model, key, value)
    if "threshold" in fields:
        session.add(
            ThresholdChange(model_id=model.id, threshold=fields["threshold"], changed_at=stamp)
        )
    model.updated_at = stamp
    session.flush()
    if reshape:
        refresh.mark_model(session, model.id)
    return model


def _check_keep(keep: float | None, label_delay_days: float, negative_after: float | None) -> None:
    from belated.store import retention

    problem = retention.too_short(keep, label_delay_days, negative_after)
    if problem is not None:
        raise invalid_field("keep_raw_days", problem)


_ROLLUP_SETTINGS = ("negative_after_days", "segment_keys", "positive", "classes")


def _checked_reference(
    session: Session, model: ModelRow, value: dict[str, Any], now: datetime
) -> dict[str, str]:
    """The reference range as stored (ISO UTC), once it holds settled labelled days: days
    that ended more than the label delay ago, with labels. Invalid (422) otherwise."""
    start, end = to_utc(value["start"]), to_utc(value["end"])
    settled_end = min(end, now - timedelta(days=model.label_delay_days))
    c = Rollup.__table__.c
    labelled = session.scalar(
        select(func.coalesce(func.sum(c.tp + c.fp + c.fn + c.tn), 0)).where(
            Rollup.model_id == model.id,
            Rollup.level == "d",
            Rollup.seg_key == "",
            Rollup.seg_value == "",
            Rollup.start >= int(start.timestamp() // 3600),
            Rollup.start + 24 <= int(settled_end.timestamp() // 3600),
        )
    )
    if not labelled:
        raise invalid_field(
            "reference",
            f"no settled labelled data from {iso(start)} to {iso(end)} (a day is settled "
            f"{model.label_delay_days:g} days after it ends); choose a settled period with labels",
        )
    return {"start": iso(start), "end": iso(end)}


def delete(*, session: Session, model: ModelRow) -> None:
    """Delete a model with all its data."""
    from belated.store import purge

    purge.model_data(session=session, model_id=model.id)
    purge.bury(session=session, model_id=model.id)
    session.execute(sql_delete(ModelRow).where(ModelRow.id == model.id))


def counts(*, session: Session, model: ModelRow) -> dict[str, Any]:
    """Stored predictions, labelled predictions, pending labels, first and last times."""
    n, labelled, first, last = session.execute(
        select(
            func.count(),
            func.count(Prediction.actual),
            func.min(Prediction.ts),
            func.max(Prediction.ts),
        ).where(Prediction.model_id == model.id)
    ).one()
    pending = session.scalar(
        select(func.count()).select_from(PendingLabel).where(PendingLabel.model_id == model.id)
    )
    return {
        "counts": {"predictions": n, "labelled": labelled, "pending_labels": pending or 0},
        "first_prediction_at": from_db(first),
        "last_prediction_at": from_db(last),
    }

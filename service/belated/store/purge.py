"""Delete a model's data table by table (SQLite cascades only with foreign keys on)."""

from __future__ import annotations

from sqlalchemy import delete
from sqlalchemy.orm import Session

from belated.store import rollup_tables as rt
from belated.store import tables as t
from belated.store.dialect import is_postgres

_TABLES: list[type] = [
    t.Prediction,
    t.Label,
    t.PendingLabel,
    t.DirtyBucket,
    t.LabelChange,
    t.ThresholdChange,
    t.Marker,
    rt.Rollup,
    rt.SegmentValue,
    rt.SegmentKey,
]


def model_data(*, session: Session, model_id: int) -> None:
    """Remove every row that belongs to the model (the model row itself stays)."""
    for table in _TABLES:
        session.execute(delete(table).where(table.model_id == model_id))  # type: ignore[attr-defined]
    if is_postgres(session):  # the id registry of the day partitions (store/partitions.py)
        session.execute(delete(t.PredictionId).where(t.PredictionId.model_id == model_id))

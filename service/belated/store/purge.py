"""Delete a model's data table by table, and sweep what a write racing the deletion left.

The high-volume tables hold `model_id` without a foreign key (store/tables.py): nothing
cascades from the model row, and nothing stops a write that looked its model up just before
the deletion from committing rows afterwards (the per-process model look-up is cached for
up to a second, and a write in flight finishes). Such rows belong to no model: no read can
reach them, since every read starts from a model found by name. The deletion leaves a
tombstone (`deleted_model:<id>` in service_state); every job run deletes the tombstoned
models' rows again, and drops the tombstone once it is older than SWEEP_SECONDS, well past
any write that could still be in flight. On SQLite, whose row ids can be handed out again,
a new model never takes a tombstoned id (model_registry.create).
"""

from __future__ import annotations

import logging
from datetime import timedelta
from typing import Any, cast

from sqlalchemy import CursorResult, delete, select
from sqlalchemy.orm import Session, sessionmaker

from belated.clock import now
from belated.store import rollup_tables as rt
from belated.store import tables as t
from belated.store.db import transaction
from belated.store.dialect import is_postgres
from belated.timeutil import to_utc

log = logging.getLogger(__name__)
SWEEP_SECONDS = 600.0
TOMBSTONE = "deleted_model:"

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


def model_data(*, session: Session, model_id: int) -> int:
    """Remove every row that belongs to the model (the model row itself stays); how many."""
    removed = 0
    tables = _TABLES + ([t.PredictionId] if is_postgres(session) else [])
    for table in tables:  # the id registry serves the day partitions only (partitions.py)
        result = session.execute(delete(table).where(table.model_id == model_id))  # type: ignore[attr-defined]
        removed += cast(CursorResult[Any], result).rowcount
    return removed


def bury(*, session: Session, model_id: int) -> None:
    """Leave the tombstone of a model deleted in this transaction (swept by the jobs)."""
    session.add(
        t.ServiceState(key=f"{TOMBSTONE}{model_id}", value={"model_id": model_id}, updated_at=now())
    )


def tombstoned_ids(session: Session) -> list[int]:
    """The ids of the deleted models whose tombstone stands (a sweep drops it once it is
    older than SWEEP_SECONDS)."""
    values = session.scalars(
        select(t.ServiceState.value).where(t.ServiceState.key.startswith(TOMBSTONE))
    )
    return sorted(int(v["model_id"]) for v in values)


def highest_tombstoned_id(session: Session) -> int:
    """The largest tombstoned model id, 0 when none."""
    return max(tombstoned_ids(session), default=0)


def sweep(factory: sessionmaker[Session]) -> dict[str, int]:
    """Delete the rows of deleted models again (one transaction each); drop the tombstones
    older than SWEEP_SECONDS after their last sweep."""
    with factory() as session:
        ids = tombstoned_ids(session)
    rows = dropped = 0
    for model_id in ids:
        with transaction(factory) as session:
            if session.get(t.ModelRow, model_id) is not None:  # never: ids are not reused
                log.error("model %s is tombstoned but exists; its rows are kept", model_id)
                continue
            found = model_data(session=session, model_id=model_id)
            if found:
                log.info("swept %d rows written for model %s after its deletion", found, model_id)
            rows += found
            stone = session.get(t.ServiceState, f"{TOMBSTONE}{model_id}")
            if stone is not None and to_utc(stone.updated_at) <= now() - timedelta(
                seconds=SWEEP_SECONDS
            ):
                session.delete(stone)
                dropped += 1
    return {"models": len(ids), "rows": rows, "tombstones_dropped": dropped}

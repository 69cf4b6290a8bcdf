"""Erasure by id: a model's predictions, their labels, label history and pending labels
removed, and their contribution taken out of the rollups by difference.

    ids ──▶ the stored predictions, locked in row order (as label writers lock them)
        ──▶ their hours held exclusively and brought up to date (every mark taken), so the
            stored rollups hold exactly the rows' current state
        ──▶ the rows aggregated with weight -1 (rollup_sql.Scope.erasing): the difference
        ──▶ raw rows deleted: predictions, label changes, label history, pending labels
        ──▶ the difference added to the hourly and daily rows (rollups.take_out); an hour
            that cannot take it is aggregated again from the rows that remain

Afterwards every window equals a recount without the erased rows, and an erased id may be
sent again as a new prediction. Admitted segment values stay (a recount keeps them too).
An id whose raw rows retention already dropped is reported `expired` and its entry in
dropped_ids deleted; what it added to the rollups of its day stays, unnamed, in the sums.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from belated.store import bulk, by_day, refresh, rollups, segments
from belated.store.dialect import is_postgres
from belated.store.tables import (
    DroppedId,
    Label,
    LabelChange,
    ModelRow,
    PendingLabel,
    Prediction,
    PredictionId,
)

ROW_CHUNK = 5000  # row ids per DELETE


@dataclass
class Erased:
    """What an erasure removed, by table, and the ids of which nothing was stored."""

    predictions: int = 0
    labels: int = 0
    pending_labels: int = 0
    not_found: list[str] = field(default_factory=list)
    expired: list[str] = field(default_factory=list)  # past retention: raw rows dropped

    def answer(self) -> dict[str, Any]:
        """The API's answer."""
        return {
            "erased": {
                "predictions": self.predictions,
                "labels": self.labels,
                "pending_labels": self.pending_labels,
            },
            "not_found": self.not_found,
            "expired": self.expired,
        }


def _stored(session: Session, model_id: int, ids: list[str]) -> dict[str, tuple[int, int]]:
    """(row id, hour) of each stored prediction of `ids`, locked on PostgreSQL."""
    found: dict[str, tuple[int, int]] = {}
    if is_postgres(session):
        # from their days' partitions only, locked (store/by_day.py)
        columns = "p.pid, p.row_id, p.hour"
        for pid, row_id, hour in by_day.fetch(session, model_id, ids, columns, lock=True):
            found[pid] = (int(row_id), int(hour))
        return found
    for cond in bulk.id_filters(session, Prediction.pid, ids):
        for pid, row_id, hour in session.execute(
            select(Prediction.pid, Prediction.row_id, Prediction.hour).where(
                Prediction.model_id == model_id, cond
            )
        ):
            found[pid] = (int(row_id), int(hour))
    return found


def _delete_by_id(session: Session, table: Any, model_id: int, ids: list[str]) -> list[str]:
    """Delete a table's rows of these ids; the id of each row deleted."""
    gone: list[str] = []
    for cond in bulk.id_filters(session, table.pid, ids):
        gone += session.scalars(
            delete(table).where(table.model_id == model_id, cond).returning(table.pid)
        )
    return gone


def erase(
    *, session: Session, model: ModelRow, ids: list[str], now: datetime, max_values: int
) -> Erased:
    """Remove everything stored under these ids in the caller's transaction."""
    ids = list(dict.fromkeys(ids))
    out = Erased()
    if not ids:
        return out
    stored = _stored(session, model.id, ids)
    row_ids = sorted(r for r, _ in stored.values())
    hours = sorted({h for _, h in stored.values()})
    difference: dict[rollups.Key, Any] = {}
    if hours:
        refresh.refresh_model_hours(session, model=model, hours=hours, max_values=max_values)
        keys = segments.current(session=session, model=model)
        scope = rollups.scope_of(model, hours, now).erasing(row_ids)
        difference = rollups.compute(session, scope, keys)
    history = _delete_by_id(session, Label, model.id, ids)
    waiting = _delete_by_id(session, PendingLabel, model.id, ids)
    out.labels, out.pending_labels = len(history), len(waiting)
    for i in range(0, len(row_ids), ROW_CHUNK):
        chunk = row_ids[i : i + ROW_CHUNK]
        # none are left after the refresh above; a change logged by a writer that raced
        # this one would point at a row that is gone
        session.execute(delete(LabelChange).where(LabelChange.row_id.in_(chunk)))
        rows = delete(Prediction).where(
            Prediction.model_id == model.id, Prediction.row_id.in_(chunk)
        )
        if is_postgres(session):  # their hours name the day partitions to look in
            rows = rows.where(Prediction.hour.in_(hours))
        session.execute(rows)
    if is_postgres(session):  # the registry: an erased id may be sent again as new
        _delete_by_id(session, PredictionId, model.id, list(stored))
    out.predictions = len(row_ids)
    if difference:
        rollups.take_out(
            session=session, model=model, difference=difference, now=now, max_values=max_values
        )
    gone = set(_delete_by_id(session, DroppedId, model.id, ids))
    out.expired = [i for i in ids if i in gone]
    known = set(stored) | set(history) | set(waiting) | gone
    out.not_found = [i for i in ids if i not in known]
    return out

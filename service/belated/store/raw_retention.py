"""Retention of raw rows with their rollups kept: whole UTC days dropped once they are old
and settled, so that the store grows with the retained days, not with the model's age.

    a UTC day that ended more than keep_raw_days ago, and every earlier one ─┐
    no dirty mark and no label change outstanding for any of their hours ───┴─▶ droppable
        ──▶ its ids recorded in dropped_ids (a late label is answered `expired`)
        ──▶ delete_raw_hours: its predictions and their label history removed
        ──▶ models.raw_from_hour raised to the first day kept
    the hourly and daily rollups are never touched: every window answers as before.

Below raw_from_hour the rollups are all there is, so nothing may aggregate those hours from
raw rows again: the refresh discards marks below it (`retained_hours`), a rebuild starts at
it, and a prediction back-filled before it is refused (`refuse_before`). A dropped id is
forgotten keep_raw_days after its day was dropped. Models fed from the lake have no raw
rows and are left alone.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from typing import Any, cast

from sqlalchemy import Connection, CursorResult, delete, func, select, text
from sqlalchemy.orm import Session

from belated.errors import Invalid, field_error
from belated.ingest.validate import PredictionIn
from belated.store import bulk, partition_retention
from belated.store.dialect import upsert
from belated.store.retention import keep_raw_days
from belated.store.tables import (
    DirtyBucket,
    DroppedId,
    Label,
    LabelChange,
    ModelRow,
    Prediction,
    ServiceState,
)

log = logging.getLogger(__name__)
DROPPED_KEY = "raw_dropped"  # ServiceState: {"days", "rows", "last_at", "last_days", "last_rows"}
DELETE_HOURS = 24  # hours of raw rows per DELETE


def day_of(hour: int) -> datetime:
    """The UTC midnight starting the day of an epoch hour."""
    return datetime.fromtimestamp((hour - hour % 24) * 3600, UTC)


def _first_unsettled(session: Session, model_id: int, below: int) -> int | None:
    """The lowest hour under `below` with a mark or a label change still to be refreshed."""
    found = [
        session.scalar(
            select(func.min(table.hour)).where(table.model_id == model_id, table.hour < below)
        )
        for table in (DirtyBucket, LabelChange)
    ]
    return min((int(h) for h in found if h is not None), default=None)


def delete_raw_hours(session: Session, model_id: int, lo_hour: int, hi_hour: int) -> int:
    """Remove the raw rows of hours [lo_hour, hi_hour): predictions and their label
    history, a day per DELETE; the number of predictions removed. The one place raw rows
    are removed by retention (a partition drop can take its place)."""
    if session.get_bind().dialect.name == "postgresql":  # day partitions dropped whole
        return partition_retention.drop_model_hours(session, model_id, lo_hour, hi_hour)
    removed = 0
    for start in range(lo_hour, hi_hour, DELETE_HOURS):
        end = min(start + DELETE_HOURS, hi_hour)
        rows = (
            (Prediction.model_id == model_id) & (Prediction.hour >= start) & (Prediction.hour < end)
        )
        session.execute(
            delete(Label).where(
                Label.model_id == model_id, Label.pid.in_(select(Prediction.pid).where(rows))
            )
        )
        result = cast(CursorResult[Any], session.execute(delete(Prediction).where(rows)))
        removed += int(result.rowcount or 0)
    return removed


class Raced(Exception):
    """A writer touched a day while it was being dropped: the drop is undone, and tried
    again on the next run."""


def drop_raw_days(*, session: Session, model: ModelRow, now: datetime) -> dict[str, int]:
    """Drop the raw rows of the model's settled days that ended more than keep_raw_days ago
    (their rollups kept); answer the days and rows dropped and the dropped ids forgotten."""
    answer = {"days": 0, "rows": 0, "forgotten": 0}
    if model.source != "http":
        return answer
    keep = keep_raw_days(model)
    cut_hour = int((now - timedelta(days=keep)).timestamp() // 3600)
    upto = cut_hour - cut_hour % 24  # the day holding the cut is kept whole
    unsettled = _first_unsettled(session, model.id, upto)
    if unsettled is not None:
        upto = unsettled - unsettled % 24
    lo = session.scalar(
        select(func.min(Prediction.hour)).where(
            Prediction.model_id == model.id, Prediction.hour < upto
        )
    )
    if lo is not None:
        in_range = (
            (Prediction.model_id == model.id) & (Prediction.hour >= lo) & (Prediction.hour < upto)
        )
        days = session.scalar(
            select(func.count(func.distinct(Prediction.hour // 24))).where(in_range)
        )
        record = upsert(session, DroppedId).from_select(
            ["model_id", "pid", "hour"],
            select(Prediction.model_id, Prediction.pid, Prediction.hour).where(in_range),
        )
        record = record.on_conflict_do_update(
            index_elements=["model_id", "pid"], set_={"hour": record.excluded.hour}
        )
        session.execute(record)
        answer["rows"] = delete_raw_hours(session, model.id, int(lo), upto)
        answer["days"] = int(days or 0)
        # a writer that committed between the check above and the delete left a mark or a
        # change for a row that is gone: undo this drop rather than lose its write
        raced = _first_unsettled(session, model.id, upto)
        if raced is not None:
            raise Raced(f"model {model.id}: hour {raced} was written while being dropped")
        model.raw_from_hour = max(upto, model.raw_from_hour or upto)
    if model.raw_from_hour is not None:
        forget = model.raw_from_hour - int(keep * 24)
        result = cast(
            CursorResult[Any],
            session.execute(
                delete(DroppedId).where(DroppedId.model_id == model.id, DroppedId.hour < forget)
            ),
        )
        answer["forgotten"] = int(result.rowcount or 0)
    if answer["rows"]:
        _count(session, answer, now)
    session.flush()
    return answer


def _count(session: Session, answer: dict[str, int], now: datetime) -> None:
    state = session.get(ServiceState, DROPPED_KEY)
    old: dict[str, Any] = dict(state.value) if state is not None else {}
    value = {
        "days": int(old.get("days", 0)) + answer["days"],
        "rows": int(old.get("rows", 0)) + answer["rows"],
        "last_days": answer["days"],
        "last_rows": answer["rows"],
        "last_at": now.isoformat().replace("+00:00", "Z"),
    }
    if state is None:
        session.add(ServiceState(key=DROPPED_KEY, value=value, updated_at=now))
    else:
        state.value, state.updated_at = value, now


def dropped_totals(*, conn: Connection) -> dict[str, int]:
    """Raw days and rows retention has dropped since the store was created."""
    value: Any = conn.execute(
        select(ServiceState.value).where(ServiceState.key == DROPPED_KEY)
    ).scalar()
    value = value or {}
    return {"days": int(value.get("days", 0)), "rows": int(value.get("rows", 0))}


def retained_hours(session: Session, model: ModelRow, hours: Sequence[int]) -> list[int]:
    """The hours at or above the model's raw_from_hour. Marks below it are discarded (with
    their label changes, which point at rows that are gone): aggregating such an hour from
    raw rows would erase the rollups that are all that is left of it."""
    first = model.raw_from_hour
    if first is None:
        return list(hours)
    below = sorted({h for h in hours if h < first})
    if below:
        log.warning(
            "model %s: %d marked hours below raw_from_hour %s (raw rows dropped) discarded;"
            " their rollups are kept as they are",
            model.id,
            len(below),
            first,
        )
        session.execute(
            delete(LabelChange).where(LabelChange.model_id == model.id, LabelChange.hour.in_(below))
        )
    return [h for h in hours if h >= first]


def refuse_before(*, session: Session, model_id: int, preds: Sequence[PredictionIn]) -> None:
    """A 422 naming each prediction whose hour is below the model's raw_from_hour: its day's
    raw rows were dropped, and storing it would need its hour aggregated again."""
    if not preds:
        return
    first = session.scalar(select(ModelRow.raw_from_hour).where(ModelRow.id == model_id))
    if first is None:
        return
    since = day_of(int(first)).date().isoformat()
    errors = [
        {
            **field_error(
                i,
                "ts",
                f"before the retained raw days: the model keeps raw rows from {since}"
                " (keep_raw_days); an older day's rollups are final",
            ),
            "id": p.pid,
        }
        for i, p in enumerate(preds)
        if int(p.ts.timestamp() // 3600) < first
    ]
    if errors:
        raise Invalid(errors)


def refuse_each(session: Session, batches: Sequence[tuple[int, Sequence[PredictionIn]]]) -> None:
    """`refuse_before` for the batches of several models (a group of small requests)."""
    for model_id in sorted({m for m, _ in batches}):
        items = [p for m, preds in batches if m == model_id for p in preds]
        refuse_before(session=session, model_id=model_id, preds=items)


def expired_ids(session: Session, model_id: int, ids: Sequence[str]) -> set[str]:
    """Those of `ids` (ids without a stored prediction) whose raw rows retention dropped."""
    found: set[str] = set()
    for cond in bulk.id_filters(session, DroppedId.pid, list(ids)) if ids else ():
        found.update(
            session.scalars(select(DroppedId.pid).where(DroppedId.model_id == model_id, cond))
        )
    return found


def take_expired_from_stage(session: Session, model_id: int, stage: str) -> int:
    """Delete from a staged labels batch (PostgreSQL) the ids past retention that have no
    stored prediction; how many."""
    result = cast(
        CursorResult[Any],
        session.execute(
            text(
                f"DELETE FROM {stage} s USING dropped_ids d"
                " WHERE d.model_id = :m AND d.pid = s.pid AND NOT EXISTS"
                " (SELECT 1 FROM prediction_ids r WHERE r.model_id = :m AND r.pid = s.pid)"
            ),
            {"m": model_id},
        ),
    )
    return int(result.rowcount or 0)

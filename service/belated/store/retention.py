"""How long a model's raw rows are kept, and the jobs' sweep of pending labels past it.

`keep_raw_days` defaults to the larger of `label_delay_days` and `negative_after_days`,
plus 30 days: a label can still arrive, or a prediction cross into an implied negative, for
that long, and a month on top leaves room for late feeds. A pending label that has waited
longer than that for its prediction is dropped by the jobs, and counted (/healthz,
Prometheus), so that a feed of labels for predictions never sent does not grow without end.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import Connection, delete, select
from sqlalchemy.orm import Session

from belated.store.tables import ModelRow, PendingLabel, ServiceState

MARGIN_DAYS = 30.0
DROPPED_KEY = "pending_dropped"  # ServiceState: {"total": n, "last_at": iso, "last": n}


def default_keep_raw_days(label_delay_days: float, negative_after_days: float | None) -> float:
    """The larger of the label delay and the implied-negative age, plus MARGIN_DAYS."""
    return max(label_delay_days, negative_after_days or 0.0) + MARGIN_DAYS


def keep_raw_days(model: ModelRow) -> float:
    """The model's setting, or its default."""
    if model.keep_raw_days is not None:
        return float(model.keep_raw_days)
    return default_keep_raw_days(model.label_delay_days, model.negative_after_days)


def too_short(
    keep: float | None, label_delay_days: float, negative_after_days: float | None
) -> str | None:
    """Why a `keep_raw_days` value cannot be taken (None when it can): raw rows must outlive
    the time labels take to arrive and predictions to become implied negatives."""
    if keep is None:
        return None
    floor = max(label_delay_days, negative_after_days or 0.0)
    if keep < floor:
        return (
            f"must be at least {floor:g} days (the larger of label_delay_days and "
            "negative_after_days): raw rows must outlive the labels still to come"
        )
    return None


def drop_old_pending(*, session: Session, now: datetime) -> dict[str, int]:
    """Delete every model's pending labels received more than `keep_raw_days` ago; the
    number dropped per model id (models with none left out). Adds them to the total kept
    for /healthz and /metrics."""
    dropped: dict[str, int] = {}
    models = session.scalars(
        select(ModelRow).where(
            ModelRow.id.in_(select(PendingLabel.model_id).distinct().scalar_subquery())
        )
    ).all()
    for model in models:
        cutoff = now - timedelta(days=keep_raw_days(model))
        gone = session.execute(
            delete(PendingLabel)
            .where(PendingLabel.model_id == model.id, PendingLabel.received_at < cutoff)
            .returning(PendingLabel.row_id)
        ).all()
        if gone:
            dropped[str(model.id)] = len(gone)
    n = sum(dropped.values())
    if n:
        state = session.get(ServiceState, DROPPED_KEY)
        total = int(state.value.get("total", 0)) if state is not None else 0
        value = {"total": total + n, "last": n, "last_at": now.isoformat().replace("+00:00", "Z")}
        if state is None:
            session.add(ServiceState(key=DROPPED_KEY, value=value, updated_at=now))
        else:
            state.value, state.updated_at = value, now
    return dropped


def dropped_total(*, conn: Connection) -> int:
    """Pending labels the jobs have dropped since the store was created."""
    value: Any = conn.execute(
        select(ServiceState.value).where(ServiceState.key == DROPPED_KEY)
    ).scalar()
    return int(value.get("total", 0)) if value else 0

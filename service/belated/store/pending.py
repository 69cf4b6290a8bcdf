"""Labels waiting for their prediction, as the API lists them (oldest first, paged)."""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.store import retention
from belated.store.tables import ModelRow, PendingLabel
from belated.timeutil import to_utc


def list_(
    *, session: Session, model: ModelRow, now: datetime, after: int | None, limit: int
) -> tuple[list[dict[str, Any]], int | None]:
    """A page of the model's pending labels in the order they first arrived, each with its
    age in hours (from when its latest value was received) and when the jobs will drop it;
    and the cursor of the next page (None on the last)."""
    query = select(PendingLabel).where(PendingLabel.model_id == model.id)
    if after is not None:
        query = query.where(PendingLabel.row_id > after)
    found = list(session.scalars(query.order_by(PendingLabel.row_id).limit(limit + 1)))
    more = len(found) > limit
    found = found[:limit]
    keep = timedelta(days=retention.keep_raw_days(model))
    items = []
    for row in found:
        received = to_utc(row.received_at)
        items.append(
            {
                "id": row.pid,
                "actual": row.actual,
                "ts": to_utc(row.ts),
                "received_at": received,
                "age_hours": round(max(0.0, (now - received).total_seconds()) / 3600, 3),
                "dropped_after": received + keep,
            }
        )
    return items, (found[-1].row_id if more and found else None)

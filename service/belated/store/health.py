"""What /healthz reads from the store: is it up, and how far behind the rollups are."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Connection, func, select, text

from belated.store import raw_retention, retention
from belated.store.tables import DirtyBucket, ServiceState
from belated.timeutil import from_db, iso


def ping(*, conn: Connection) -> None:
    """Run the smallest query; raises when the store does not answer."""
    conn.execute(text("SELECT 1"))


def refresh_state(*, conn: Connection, now: datetime) -> dict[str, Any]:
    """Dirty buckets, the oldest mark, the refresh lag as of `now`, the last refresh, and
    the pending labels, raw days and raw rows the jobs have dropped since the store was
    created."""
    buckets = select(DirtyBucket.model_id, DirtyBucket.hour).distinct().subquery()
    n = conn.execute(select(func.count()).select_from(buckets)).scalar_one()
    oldest = conn.execute(select(func.min(DirtyBucket.marked_at))).scalar()
    last = conn.execute(
        select(ServiceState.value).where(ServiceState.key == "last_refresh")
    ).scalar()
    answer: dict[str, Any] = {"dirty_buckets": int(n), "refresh_lag_seconds": 0.0}
    oldest_dt = from_db(oldest)
    if oldest_dt is not None:
        answer["oldest_dirty_bucket"] = iso(oldest_dt)
        answer["refresh_lag_seconds"] = round((now - oldest_dt).total_seconds(), 3)
    if last:
        answer["last_refresh"] = last.get("at")
    answer["pending_labels_dropped"] = retention.dropped_total(conn=conn)
    raw = raw_retention.dropped_totals(conn=conn)
    answer["raw_days_dropped"], answer["raw_rows_dropped"] = raw["days"], raw["rows"]
    return answer

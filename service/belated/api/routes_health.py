"""GET /healthz: is the store reachable, who runs the jobs, how stale are the rollups."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from sqlalchemy.exc import SQLAlchemyError

from belated.clock import clock
from belated.store import health as store_health

router = APIRouter(tags=["health"])


def health(request: Request) -> dict[str, Any]:
    """What /healthz reports, also used by /metrics."""
    state = request.app.state
    jobs = getattr(state, "jobs", None)
    answer: dict[str, Any] = {
        "status": "ok",
        "store": "up",
        "jobs": {"enabled": jobs is not None, "leader": bool(jobs and jobs.is_leader())},
        "last_refresh": None,
        "refresh_lag_seconds": None,
        "dirty_buckets": None,
        "oldest_dirty_bucket": None,
        "outbox_backlog": None,
        "pending_labels_dropped": None,
        # a read-write service refreshes before every read: its answers are never stale
        "read_only": False,
        "staleness_seconds": 0.0,
    }
    freshness = getattr(state, "freshness", None)
    try:
        if freshness is not None:  # a read-only replica (api/readonly.py)
            answer.update(freshness.report())
        with state.engine.connect() as conn:
            store_health.ping(conn=conn)
            answer.update(store_health.refresh_state(conn=conn, now=clock.now()))
            backlog = getattr(state, "outbox_backlog", None)
            answer["outbox_backlog"] = backlog(conn) if backlog else 0
    except SQLAlchemyError as exc:
        answer.update(status="degraded", store="down", error=type(exc).__name__)
    return answer


@router.get("/healthz")
def healthz(request: Request) -> JSONResponse:
    """Store reachable, jobs leader, last refresh, refresh lag, oldest dirty bucket, backlog,
    pending labels dropped past keep_raw_days, raw days and rows dropped by retention,
    read-only and staleness."""
    answer = health(request)
    return JSONResponse(answer, status_code=200 if answer["store"] == "up" else 503)

"""GET /metrics: Prometheus text exposition (model figures only with a read token)."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import PlainTextResponse

from belated.api import prometheus
from belated.api.deps import bearer
from belated.api.routes_health import health
from belated.errors import Problem
from belated.metrics import figures
from belated.store import keys

router = APIRouter(tags=["health"])


@router.get("/metrics", response_class=PlainTextResponse)
def metrics(request: Request) -> PlainTextResponse:
    """Service counters; with a read token (Prometheus sends bearer tokens) the project's
    models' latest settled figures, as cached by the jobs."""
    counters, state = request.app.state.counters.snapshot(), health(request)
    cached: dict[str, Any] | None = None
    token = bearer(request)
    if token:
        with request.app.state.sessions() as session:
            who = keys.resolve(session=session, token=token)
            if who is None:
                raise Problem(
                    401, "the bearer token is not valid", headers={"WWW-Authenticate": "Bearer"}
                )
            if "read" not in who.scopes:
                raise Problem(403, "this token lacks the 'read' scope")
            cached = figures.cached(session=session, project_id=who.project_id)
    body = prometheus.render(counters=counters, health=state, cached=cached)
    return PlainTextResponse(body, media_type=prometheus.CONTENT_TYPE)

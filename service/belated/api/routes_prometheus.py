"""GET /metrics: Prometheus text exposition (model figures only with a read token)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import PlainTextResponse

from belated import prom
from belated.api.deps import bearer
from belated.api.routes_health import health
from belated.errors import Problem
from belated.store import keys

router = APIRouter(tags=["health"])
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


@router.get("/metrics", response_class=PlainTextResponse)
def metrics(request: Request) -> PlainTextResponse:
    """Service counters; with a read token (Prometheus sends bearer tokens) the project's
    models' latest settled figures, as cached by the jobs."""
    out = prom.Exposition()
    prom.service_metrics(out, request.app.state.counters.snapshot(), health(request))
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
            prom.model_metrics(out, prom.cached(session, who.project_id))
    return PlainTextResponse(out.render(), media_type=CONTENT_TYPE)

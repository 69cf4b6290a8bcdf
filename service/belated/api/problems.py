"""RFC 9457 problem details for every error the API returns."""

from __future__ import annotations

import logging
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from sqlalchemy.exc import DBAPIError, OperationalError
from starlette.exceptions import HTTPException

from belated.errors import Conflict, DomainError, NotFound, Problem

log = logging.getLogger(__name__)

MEDIA = "application/problem+json"
TITLES = {
    400: "Bad request",
    401: "Unauthorized",
    403: "Forbidden",
    404: "Not found",
    405: "Method not allowed",
    409: "Conflict",
    413: "Payload too large",
    422: "Invalid input",
    503: "Service unavailable",
}


def problem_response(
    status: int,
    detail: str,
    *,
    title: str | None = None,
    headers: dict[str, str] | None = None,
    **extra: Any,
) -> Response:
    """A problem+json response."""
    body: dict[str, Any] = {
        "type": "about:blank",
        "title": title or TITLES.get(status, "Error"),
        "status": status,
        "detail": detail,
    }
    body.update({k: v for k, v in extra.items() if v is not None})
    return Response(orjson.dumps(body), status_code=status, media_type=MEDIA, headers=headers)


def as_problem(exc: DomainError) -> Problem:
    """The problem details of a domain error: 404 for NotFound, 409 for Conflict."""
    if isinstance(exc, NotFound):
        return Problem(404, exc.detail, title="Not found")
    if isinstance(exc, Conflict):
        return Problem(409, exc.detail, title=exc.title, **exc.extra)
    return Problem(400, exc.detail)


def _loc(loc: tuple[Any, ...]) -> tuple[int | None, str]:
    parts = [p for p in loc if p not in ("body", "query", "path")]
    index = next((p for p in parts if isinstance(p, int)), None)
    field = ".".join(str(p) for p in parts if not isinstance(p, int))
    return index, field


def install(app: FastAPI) -> None:
    """Register the handlers that turn every error into problem details."""

    @app.exception_handler(Problem)
    async def _problem(_: Request, exc: Problem) -> Response:
        return problem_response(
            exc.status,
            exc.detail,
            title=exc.title,
            headers=exc.headers,
            errors=exc.errors,
            **exc.extra,
        )

    @app.exception_handler(DomainError)
    async def _domain(request: Request, exc: DomainError) -> Response:
        return await _problem(request, as_problem(exc))

    @app.exception_handler(RequestValidationError)
    async def _invalid(_: Request, exc: RequestValidationError) -> Response:
        errors = []
        for err in exc.errors():
            index, field = _loc(tuple(err.get("loc", ())))
            reason = str(err.get("msg", "invalid")).removeprefix("Value error, ")
            errors.append({"index": index, "field": field or "body", "reason": reason})
        first = errors[0] if errors else {"field": "", "reason": "invalid"}
        detail = f"field '{first['field']}': {first['reason']}"
        return problem_response(422, detail, errors=errors)

    @app.exception_handler(HTTPException)
    async def _http(_: Request, exc: HTTPException) -> Response:
        headers = dict(exc.headers) if exc.headers else None
        return problem_response(exc.status_code, str(exc.detail), headers=headers)

    @app.exception_handler(OperationalError)
    async def _store_down(_: Request, exc: OperationalError) -> Response:
        log.warning("answered 503: %s: %s", type(exc.orig).__name__, str(exc.orig)[:200])
        return problem_response(
            503,
            "the store is unreachable or busy; retry shortly (nothing was stored)",
            headers={"Retry-After": "2"},
        )

    @app.exception_handler(DBAPIError)
    async def _store_error(_: Request, exc: DBAPIError) -> Response:
        if exc.connection_invalidated:
            return problem_response(
                503, "the store connection was lost; retry shortly", headers={"Retry-After": "2"}
            )
        raise exc

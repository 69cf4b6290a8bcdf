"""Request dependencies: the session (one transaction per request) and the caller's token."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Annotated, Any

import orjson
from fastapi import Depends, Request
from sqlalchemy.orm import Session

from belated.errors import Problem
from belated.store import keys
from belated.store.keys import Principal


def get_session(request: Request) -> Iterator[Session]:
    """One transaction per request: commit on success, roll back on any error."""
    session: Session = request.app.state.sessions()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


# scope="function": the commit happens before the answer is sent, so a 2xx means stored.
SessionDep = Annotated[Session, Depends(get_session, scope="function")]


def bearer(request: Request) -> str | None:
    """The bearer token of the request, or the dashboard cookie."""
    header = request.headers.get("authorization", "")
    scheme, _, value = header.partition(" ")
    if scheme.lower() == "bearer" and value.strip():
        return value.strip()
    return request.cookies.get("belated_token") or None


def principal(request: Request, session: SessionDep) -> Principal:
    """The caller; 401 without a live token."""
    token = bearer(request)
    found = keys.resolve(session=session, token=token) if token else None
    if found is None:
        raise Problem(
            401,
            "a valid bearer token is required (Authorization: Bearer <token>)",
            headers={"WWW-Authenticate": "Bearer"},
        )
    return found


def scope(name: str) -> Any:
    """A dependency that requires a scope; checked before any model is looked up."""

    def check(who: Annotated[Principal, Depends(principal)]) -> Principal:
        if name not in who.scopes:
            raise Problem(403, f"this token lacks the '{name}' scope")
        return who

    return Depends(check)


Ingest = Annotated[Principal, scope("ingest")]
Read = Annotated[Principal, scope("read")]
Admin = Annotated[Principal, scope("admin")]


async def json_body(request: Request) -> Any:
    """Parse the body as JSON; a body that is not JSON is a 400."""
    raw = await request.body()
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        # orjson refuses numbers that overflow a double (1e400); the standard parser reads
        # them as infinity, which validation then reports by item and field. Nothing else
        # falls back: deep nesting and lone surrogates stay a 400.
        if "infinity" not in str(exc):
            raise Problem(400, f"the body is not valid JSON: {exc}") from None
        try:
            return json.loads(raw)
        except (ValueError, UnicodeDecodeError, RecursionError):
            raise Problem(400, f"the body is not valid JSON: {exc}") from None


JsonBody = Annotated[Any, Depends(json_body)]

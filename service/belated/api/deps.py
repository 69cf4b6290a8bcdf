"""Request dependencies: the session (one transaction per request), the caller's token, the
model named in the path, the settings and the request's one clock reading."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from datetime import datetime
from typing import Annotated, Any, TypeVar

import orjson
from fastapi import Depends, Request
from fastapi.concurrency import run_in_threadpool
from sqlalchemy.orm import Session

from belated.alerts import rules
from belated.alerts.tables import Rule
from belated.api.fastpath import PARSED_BODY
from belated.api.lookups import Lookups, ModelRef
from belated.clock import clock
from belated.config import Settings
from belated.errors import Problem
from belated.store import keys, model_registry
from belated.store.db import transaction
from belated.store.keys import Principal
from belated.store.tables import ModelRow

T = TypeVar("T")


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
    after_commit(session)


def _run_in_transaction(request: Request, work: Callable[[Session], T]) -> T:
    with transaction(request.app.state.sessions) as session:
        result = work(session)
    after_commit(session)
    return result


MAX_WRITES_IN_FLIGHT = 32  # large batches at once; the small ones queue in store/grouped.py


async def in_transaction(request: Request, work: Callable[[Session], T]) -> T:
    """Run `work` in one transaction on a worker thread, committed before this returns (a
    2xx means stored): the request's single hop off the event loop, where a sync route
    with a session dependency takes three.

    Back-pressure: past MAX_WRITES_IN_FLIGHT writes at once the store is not keeping up,
    and the answer is a 503 with Retry-After rather than a wait without bound.
    """
    state = request.app.state
    if getattr(state, "writes_in_flight", 0) >= MAX_WRITES_IN_FLIGHT:
        raise Problem(
            503,
            "the store is not keeping up with the writes; retry after the given seconds",
            headers={"Retry-After": "1"},
        )
    state.writes_in_flight = getattr(state, "writes_in_flight", 0) + 1
    try:
        return await run_in_threadpool(_run_in_transaction, request, work)
    finally:
        state.writes_in_flight -= 1


def after_commit(session: Session) -> None:
    """Run what was left to do once `session` committed (api/lookups.py)."""
    for hook in session.info.pop("after_commit", ()):
        hook()


# scope="function": the commit happens before the answer is sent, so a 2xx means stored.
SessionDep = Annotated[Session, Depends(get_session, scope="function")]


def bearer(request: Request) -> str | None:
    """The bearer token of the request, or the dashboard cookie."""
    header = request.headers.get("authorization", "")
    scheme, _, value = header.partition(" ")
    if scheme.lower() == "bearer" and value.strip():
        return value.strip()
    return request.cookies.get("belated_token") or None


def _unauthorized() -> Problem:
    return Problem(
        401,
        "a valid bearer token is required (Authorization: Bearer <token>)",
        headers={"WWW-Authenticate": "Bearer"},
    )


def caller_of(request: Request, session: Session) -> Principal:
    """The caller, read in `session` (or the token cache); 401 without a live token."""
    token = bearer(request)
    if not token:
        raise _unauthorized()
    lookups: Lookups = request.app.state.lookups
    found = lookups.tokens.get(
        keys.hash_token(token), lambda: keys.resolve(session=session, token=token)
    )
    if found is None:
        raise _unauthorized()
    return found


async def principal(request: Request) -> Principal:
    """The caller; 401 without a live token.

    From the token cache when it can (no thread, no round trip: most requests of a live
    system), else read in a short transaction of its own on a worker thread.
    """
    token = bearer(request)
    if not token:
        raise _unauthorized()
    lookups: Lookups = request.app.state.lookups
    found = lookups.tokens.peek(keys.hash_token(token))
    if found is not None:
        return found
    return await run_in_threadpool(_read_caller, request)


def _read_caller(request: Request) -> Principal:
    session: Session = request.app.state.sessions()
    try:
        return caller_of(request, session)
    finally:
        session.close()


CallerDep = Annotated[Principal, Depends(principal)]


def scope(name: str) -> Any:
    """A dependency that requires a scope; checked before any model is looked up."""

    async def check(caller: CallerDep) -> Principal:
        if name not in caller.scopes:
            raise Problem(403, f"this token lacks the '{name}' scope")
        return caller

    return Depends(check)


Ingest = Annotated[Principal, scope("ingest")]
Read = Annotated[Principal, scope("read")]
Admin = Annotated[Principal, scope("admin")]


def path_model(model: str, caller: CallerDep, session: SessionDep) -> ModelRow:
    """The model named in the path, in the caller's project; a 404 problem when absent.

    Routes declare their scope (Admin, Read, Ingest) before ModelDep: dependencies resolve
    in that order, so a token without the scope gets a 403 before any model is looked up.
    """
    return model_registry.get(session=session, project_id=caller.project_id, name=model)


ModelDep = Annotated[ModelRow, Depends(path_model)]


async def path_model_ref(model: str, caller: CallerDep, request: Request) -> ModelRef:
    """The model named in the path as the ingest routes need it, from a cache of at most a
    second (api/lookups.py); a 404 problem when absent."""
    lookups: Lookups = request.app.state.lookups
    found = lookups.models.peek((caller.project_id, model))
    if found is not None:
        return found
    return await run_in_threadpool(_read_model_ref, request, caller.project_id, model)


def _read_model_ref(request: Request, project_id: int, name: str) -> ModelRef:
    lookups: Lookups = request.app.state.lookups

    def load() -> ModelRef:
        row = model_registry.get(session=session, project_id=project_id, name=name)
        return ModelRef(row.id, row.name, model_registry.spec_of(row), row.source or "http")

    session: Session = request.app.state.sessions()
    try:
        found = lookups.models.get((project_id, name), load)
    finally:
        session.close()
    assert found is not None  # load() raises rather than answer None
    return found


ModelRefDep = Annotated[ModelRef, Depends(path_model_ref)]


def path_rule(rule_id: str, model: ModelDep, session: SessionDep) -> Rule:
    """The rule named in the path, on the model named in the path; a 404 problem when absent."""
    return rules.get_rule(session=session, model=model, rule_id=rule_id)


RuleDep = Annotated[Rule, Depends(path_rule)]


async def app_settings(request: Request) -> Settings:
    """The settings the application was built with."""
    settings: Settings = request.app.state.settings
    return settings


SettingsDep = Annotated[Settings, Depends(app_settings)]


async def request_now() -> datetime:
    """One reading of the service clock, shared by everything the request does."""
    return clock.now()


NowDep = Annotated[datetime, Depends(request_now)]


async def json_body(request: Request) -> Any:
    """Parse the body as JSON (or take it as api/fastpath.py parsed it); a body that is not
    JSON is a 400."""
    state = request.scope.get("state") or {}
    if PARSED_BODY in state:
        return state[PARSED_BODY]
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

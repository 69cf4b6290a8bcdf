"""Routes for tokens: create (the secret is shown once), list and revoke."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response

from belated.api.deps import Admin, SessionDep
from belated.api.schemas import KeyCreate, KeyInfo, KeyPage, KeyRead
from belated.errors import Problem
from belated.store import keys
from belated.timeutil import to_utc

router = APIRouter(prefix="/v1/keys", tags=["keys"])


@router.post("", status_code=201, response_model=KeyRead)
def create_key(body: KeyCreate, who: Admin, session: SessionDep) -> KeyRead:
    """Create a token for this project; the answer is the only time the secret is shown."""
    row, secret = keys.create(
        session=session, project_id=who.project_id, scopes=sorted(set(body.scopes)), name=body.name
    )
    return KeyRead(
        id=row.id,
        scopes=row.scopes.split(","),
        name=row.name,
        created_at=row.created_at,
        token=secret,
    )


@router.get("", response_model=KeyPage)
def list_keys(who: Admin, session: SessionDep, revoked: bool = False) -> KeyPage:
    """The project's tokens without their secrets; `revoked=true` lists revoked ones too."""
    rows = keys.list_(session=session, project_id=who.project_id, revoked=revoked)
    return KeyPage(
        items=[
            KeyInfo(
                id=r.id,
                scopes=r.scopes.split(","),
                name=r.name,
                created_at=to_utc(r.created_at),
                revoked_at=r.revoked_at and to_utc(r.revoked_at),
            )
            for r in rows
        ]
    )


@router.delete("/{key_id}", status_code=204)
def revoke_key(key_id: str, who: Admin, session: SessionDep, request: Request) -> Response:
    """Revoke a token of this project."""
    request.app.state.lookups.clear_after_commit(session)
    if not keys.revoke(session=session, project_id=who.project_id, token_id=key_id):
        raise Problem(404, f"no live key {key_id!r} in this project")
    return Response(status_code=204)

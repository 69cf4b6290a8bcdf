"""Projects and API tokens. Tokens carry 256 random bits; only their SHA-256 is stored."""

from __future__ import annotations

import hashlib
import secrets
from dataclasses import dataclass

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from belated.clock import now
from belated.store.tables import Project, Token

SCOPES = ("ingest", "read", "admin")
TOKEN_PREFIX = "blt_"


@dataclass(frozen=True, slots=True)
class Principal:
    """Who is calling: the project and the scopes of the token."""

    project_id: int
    token_id: str
    scopes: frozenset[str]


def hash_token(token: str) -> str:
    """SHA-256 hex of a token (tokens are random, so no salt or stretching is needed)."""
    return hashlib.sha256(token.encode("utf-8", "surrogatepass")).hexdigest()


def parse_scopes(text: str) -> list[str]:
    """Split and check a comma list of scopes."""
    scopes = sorted({s.strip() for s in text.split(",") if s.strip()})
    bad = [s for s in scopes if s not in SCOPES]
    if bad or not scopes:
        raise ValueError(f"scopes must be a comma list of {', '.join(SCOPES)}; got {text!r}")
    return scopes


def get_or_create_project(*, session: Session, name: str) -> Project:
    """The project called `name`, created if it does not exist."""
    project = session.scalar(select(Project).where(Project.name == name))
    if project is None:
        project = Project(name=name, created_at=now())
        session.add(project)
        session.flush()
    return project


def create(
    *, session: Session, project_id: int, scopes: list[str], name: str | None = None
) -> tuple[Token, str]:
    """Create a token; returns the row and the secret, which is never stored."""
    secret = TOKEN_PREFIX + secrets.token_urlsafe(32)
    row = Token(
        id="key_" + secrets.token_hex(8),
        project_id=project_id,
        token_hash=hash_token(secret),
        scopes=",".join(scopes),
        name=name,
        created_at=now(),
    )
    session.add(row)
    session.flush()
    return row, secret


def list_(*, session: Session, project_id: int, revoked: bool = False) -> list[Token]:
    """The project's tokens, oldest first; revoked ones only when asked for."""
    query = select(Token).where(Token.project_id == project_id)
    if not revoked:
        query = query.where(Token.revoked_at.is_(None))
    return list(session.scalars(query.order_by(Token.created_at, Token.id)))


def resolve(*, session: Session, token: str) -> Principal | None:
    """The principal of a live token, or None.

    The lookup is by hash, so timing reveals nothing of the secret; the final comparison of
    hashes is constant-time anyway.
    """
    digest = hash_token(token)
    row = session.scalar(
        select(Token).where(Token.token_hash == digest, Token.revoked_at.is_(None))
    )
    if row is None or not secrets.compare_digest(row.token_hash, digest):
        return None
    return Principal(row.project_id, row.id, frozenset(row.scopes.split(",")))


def revoke(*, session: Session, project_id: int, token_id: str) -> bool:
    """Revoke a token of the project; False when there is no such live token."""
    result = session.execute(
        update(Token)
        .where(Token.id == token_id, Token.project_id == project_id, Token.revoked_at.is_(None))
        .values(revoked_at=now())
    )
    return bool(getattr(result, "rowcount", 0))

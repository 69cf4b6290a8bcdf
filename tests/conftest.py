"""Shared fixtures: a migrated store per backend (SQLite file and a real PostgreSQL database).

Each test session creates its own uniquely named PostgreSQL database and drops it at the end;
tests isolate from each other by working in projects of their own.
"""

from __future__ import annotations

import secrets
import socket
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import Engine

from belated.clock import clock
from belated.config import Settings
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import upgrade
from tests.support.live import LiveServer
from tests.support.stores import (
    STORES,
    create_pg_database,
    drop_pg_database,
    pg_url,
)

__all__ = [  # what test modules import from here
    "REPO",
    "STORES",
    "LiveServer",
    "Tenant",
    "create_pg_database",
    "drop_pg_database",
    "free_port",
    "make_tenant",
    "pg_url",
]


@pytest.fixture(autouse=True)
def _release_the_clock() -> Iterator[None]:
    """Every test ends with the service clock on real time again, whatever it froze."""
    yield
    clock.set(None)


@pytest.fixture(scope="session", params=STORES)
def store_url(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[str]:
    """A migrated store, one per backend for the whole session."""
    if request.param == "sqlite":
        path = tmp_path_factory.mktemp("store") / "belated.db"
        url = f"sqlite:///{path}"
        upgrade(url)
        yield url
        return
    name = create_pg_database()
    url = pg_url(name)
    try:
        upgrade(url)
        yield url
    finally:
        drop_pg_database(name)


@pytest.fixture(scope="session")
def engine(store_url: str) -> Iterator[Engine]:
    """An engine on the session's store."""
    eng = make_engine(store_url)
    yield eng
    eng.dispose()


@pytest.fixture()
def sessions(engine: Engine) -> Any:
    """A session factory on the store."""
    return make_sessionmaker(engine)


@dataclass
class Tenant:
    """A fresh project with one token of every scope, and an HTTP client for it."""

    name: str
    project_id: int
    tokens: dict[str, str]
    client: httpx.Client
    extra: dict[str, Any] = field(default_factory=dict)

    def headers(self, *scopes: str) -> dict[str, str]:
        """Authorization header for a token with exactly these scopes."""
        key = ",".join(sorted(scopes))
        return {"Authorization": f"Bearer {self.tokens[key]}"}


def make_tenant(sessions: Any, client: httpx.Client) -> Tenant:
    """Create a project with tokens for each scope combination used by tests."""
    from belated.store import keys

    name = "t-" + secrets.token_hex(5)
    tokens: dict[str, str] = {}
    with transaction(sessions) as session:
        project = keys.get_or_create_project(session=session, name=name)
        for scopes in (["admin"], ["ingest"], ["read"], ["admin", "ingest", "read"]):
            _, secret = keys.create(session=session, project_id=project.id, scopes=scopes)
            tokens[",".join(scopes)] = secret
        project_id = project.id
    client.headers["Authorization"] = f"Bearer {tokens['admin,ingest,read']}"
    return Tenant(name, project_id, tokens, client)


@pytest.fixture()
def settings(store_url: str) -> Settings:
    """Settings bound to the test store, jobs off (tests that want jobs start them)."""
    return Settings(
        database_url=store_url, jobs=False, max_batch=10_000, max_body_bytes=16 * 1024 * 1024
    )


@pytest.fixture()
def app(settings: Settings, engine: Engine) -> Any:
    """The ASGI app on the test store."""
    from belated.app import create_app

    return create_app(settings, engine=engine, jobs=False)


@pytest.fixture()
def client(app: Any) -> Iterator[httpx.Client]:
    """An in-process HTTP client (the ASGI app driven through httpx)."""
    from fastapi.testclient import TestClient

    with TestClient(app, base_url="http://testserver") as c:
        yield c


@pytest.fixture()
def tenant(sessions: Any, client: httpx.Client) -> Tenant:
    """A fresh project whose client sends an all-scopes token by default."""
    return make_tenant(sessions, client)


def free_port() -> int:
    """An unused loopback port, for a service started as a separate process (which must be
    told its port); servers in this process bind port 0 instead (see tests/support/live.py)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture()
def live(app: Any) -> Iterator[LiveServer]:
    """The app served over real HTTP on loopback."""
    with LiveServer(app) as server:
        yield server


REPO = Path(__file__).resolve().parents[1]

"""`serve --read-only` in process, on both stores: a second app over the same store with
read-only connections answers reads as the rollups stand, never refreshing first, says how
stale it is, and refuses every write with 405 while nothing is written.

(A real streaming standby is tested in tests/hostile/test_replica.py.)
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import timedelta
from types import SimpleNamespace
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, func, inspect, select
from sqlalchemy.exc import DBAPIError

from belated.app import create_app
from belated.clock import clock
from belated.config import Settings
from belated.jobs.steps import refresh_step
from belated.store import staleness
from belated.store.db import make_engine, make_sessionmaker
from belated.store.tables import Base, ServiceState
from tests.conftest import Tenant
from tests.support import label, outcome_of, predictions, unique_name, utcnow

WRITES = [
    ("POST", "/v1/models", {"name": "chairs"}),
    ("POST", "/v1/models/{m}/predictions", {"predictions": predictions(1, prefix="late")}),
    ("POST", "/v1/models/{m}/labels", {"labels": [label("order-0", "0")]}),
    ("PATCH", "/v1/models/{m}", {"threshold": 0.3}),
    ("DELETE", "/v1/models/{m}", None),
    ("PUT", "/v1/models/{m}/rollups", None),
    ("POST", "/v1/keys", {"scopes": ["read"]}),
    ("DELETE", "/v1/models/{m}/predictions", {"ids": ["order-1"]}),
    ("POST", "/v1/webhooks", {"url": "https://example.org/hook"}),
    ("OPTIONS", "/v1/models", None),
]


@pytest.fixture()
def replica(store_url: str) -> Iterator[tuple[TestClient, Engine]]:
    """A read-only app over the test store, with its own read-only engine."""
    settings = Settings(database_url=store_url, read_only=True, jobs=True)
    app = create_app(settings)
    engine: Engine = app.app.app.state.engine  # ReadOnly -> BodyLimit -> FastAPI
    with TestClient(app, base_url="http://testserver") as c:
        yield c, engine
    engine.dispose()


def _fed(tenant: Tenant, engine: Engine, settings: Settings) -> tuple[str, int]:
    """A model with 48 predictions and 24 labels, refreshed by the jobs' refresh step."""
    c, name = tenant.client, unique_name()
    assert c.post("/v1/models", json={"name": name}).status_code == 201
    rows = predictions(48)
    assert c.post(f"/v1/models/{name}/predictions", json={"predictions": rows}).status_code == 200
    labels = [label(r["id"], outcome_of(n)) for n, r in enumerate(rows[:24])]
    assert c.post(f"/v1/models/{name}/labels", json={"labels": labels}).status_code == 200
    refresh_step(SimpleNamespace(sessions=make_sessionmaker(engine), settings=settings))
    return name, 48


def _counts(engine: Engine) -> dict[str, int]:
    """Rows of every table of the store."""
    present = set(inspect(engine).get_table_names())
    with engine.connect() as conn:
        return {
            t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one())
            for t in Base.metadata.sorted_tables
            if t.name in present  # the id registry is PostgreSQL's only
        }


def _state(engine: Engine) -> dict[str, Any]:
    with engine.connect() as conn:
        return {k: v for k, v in conn.execute(select(ServiceState.key, ServiceState.value)).all()}


def test_reads_answer_as_the_rollups_stand_with_their_staleness(
    tenant: Tenant,
    engine: Engine,
    settings: Settings,
    replica: tuple[TestClient, Engine],
) -> None:
    rc, _ = replica
    rc.headers.update(tenant.client.headers)
    before = utcnow()
    name, n = _fed(tenant, engine, settings)
    with engine.connect() as conn:
        through = staleness.refreshed_through(conn=conn)
    assert through is not None and before <= through <= utcnow()
    # the replica's answer is the primary's: the rollups hold every write so far
    path = f"/v1/models/{name}/metrics?granularity=day"
    primary = tenant.client.get(path).json()["windows"]
    got = rc.get(path)
    assert got.status_code == 200
    assert got.json()["windows"] == primary
    assert sum(w["predictions"] for w in got.json()["windows"]) == n
    # staleness is counted from the start of the last complete refresh, by the service clock
    clock.set(through + timedelta(seconds=42.25))
    r = rc.get(path)
    assert r.headers["x-belated-staleness"] == "42.250"
    health = rc.get("/healthz").json()
    assert health["read_only"] is True and health["staleness_seconds"] == 42.25
    assert health["jobs"] == {"enabled": False, "leader": False}
    assert rc.get("/healthz").headers["x-belated-staleness"] == "42.250"
    head = rc.head(path)  # a read method too: the GET's status and headers, no body
    assert head.status_code == 200 and head.content == b""
    assert head.headers["x-belated-staleness"] == "42.250"
    assert head.headers["content-length"] == r.headers["content-length"]
    scrape = rc.get("/metrics").text
    assert "belated_staleness_seconds 42.25" in scrape
    assert "belated_read_only 1.0" in scrape
    assert tenant.client.get("/healthz").json()["read_only"] is False
    clock.set(None)
    # a write the jobs have not refreshed yet: the replica neither refreshes nor shows it
    more = predictions(6, start=100)
    assert (
        tenant.client.post(f"/v1/models/{name}/predictions", json={"predictions": more})
    ).status_code == 200
    dirty = _counts(engine)["dirty_buckets"]
    assert dirty > 0
    stale = rc.get(path).json()["windows"]
    assert sum(w["predictions"] for w in stale) == n
    assert _counts(engine)["dirty_buckets"] == dirty  # nothing refreshed, nothing written
    fresh = tenant.client.get(path).json()["windows"]  # the primary refreshes before it reads
    assert sum(w["predictions"] for w in fresh) == n + 6


def test_every_write_is_405_and_nothing_is_written(
    tenant: Tenant,
    engine: Engine,
    settings: Settings,
    replica: tuple[TestClient, Engine],
) -> None:
    rc, _ = replica
    rc.headers.update(tenant.client.headers)
    name, _ = _fed(tenant, engine, settings)
    counts, state = _counts(engine), _state(engine)
    for method, path, body in WRITES:
        r = rc.request(method, path.format(m=name), json=body)
        assert r.status_code == 405, (method, path, r.text)
        assert r.headers["allow"] == "GET, HEAD"
        assert r.headers["content-type"] == "application/problem+json"
        problem = r.json()
        assert problem["status"] == 405 and "read-only" in problem["detail"]
        assert "nothing was stored" in problem["detail"].lower()
        assert float(r.headers["x-belated-staleness"]) >= 0
    assert _counts(engine) == counts
    assert _state(engine) == state
    # reads of every kind still answer
    for path in ("/v1/models", f"/v1/models/{name}", f"/v1/models/{name}/thresholds", "/v1/alerts"):
        assert rc.get(path).status_code == 200, path
    assert _counts(engine) == counts


def test_the_read_only_connection_refuses_a_write(replica: tuple[TestClient, Engine]) -> None:
    """A write missed by the 405 layer would fail loudly, not land in the store."""
    _, ro = replica
    with pytest.raises(DBAPIError, match="(?i)read-?only"), ro.begin() as conn:
        conn.execute(ServiceState.__table__.delete())


def test_read_only_sqlite_needs_a_file() -> None:
    with pytest.raises(ValueError, match="file path"):
        make_engine("sqlite://", read_only=True)

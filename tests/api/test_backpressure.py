"""Back-pressure: a store that does not keep up gets 503 with Retry-After, not a queue
without bound, and nothing of a refused request is stored.

The store is held up for real: another session holds the hour's lock that a refresh would
hold (store/dirty.py), so the group writer's transaction waits at its hold on the hour. The
writer's queue is made small (two batches) so that a handful of concurrent requests fills it.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from typing import Any

import httpx
import psycopg
import pytest
from sqlalchemy import Engine

from belated.app import create_app
from belated.config import Settings
from belated.store.db import make_engine, make_sessionmaker
from belated.store.grouped import GroupWriter
from belated.store.migrate import upgrade
from belated.store.predictions import epoch_hour
from tests.conftest import LiveServer, make_tenant
from tests.support import count, create_model
from tests.support.polling import wait_until
from tests.support.stores import PG_ADMIN, create_pg_database, drop_pg_database, pg_url


@pytest.fixture()
def pg_store() -> Iterator[tuple[str, Engine, Any]]:
    """A migrated PostgreSQL database of its own (the hold on an hour is a PostgreSQL
    advisory lock; SQLite's single writer has none), dropped afterwards."""
    name = create_pg_database("belated_bp")
    url = pg_url(name)
    try:
        upgrade(url)
        engine = make_engine(url)
        yield url, engine, make_sessionmaker(engine)
        engine.dispose()
    finally:
        drop_pg_database(name)


@contextmanager
def _hour_held(engine: Engine, model_id: int, hour: int) -> Iterator[None]:
    """Another session holds the hour as a refresh would (store/dirty.py)."""
    holder = psycopg.connect(
        PG_ADMIN.rsplit("/", 1)[0] + f"/{engine.url.database}", autocommit=True
    )
    holder.execute("SELECT pg_advisory_lock(%s, %s)", (model_id, hour))
    try:
        yield
    finally:
        holder.execute("SELECT pg_advisory_unlock(%s, %s)", (model_id, hour))
        holder.close()


def _post_while_held(
    server: LiveServer,
    engine: Engine,
    sessions: Any,
    bodies: list[list[dict[str, Any]]],
    refused: int,
) -> tuple[list[httpx.Response], int]:
    """Post each body from a thread of its own while the hour of their rows is held, until
    `refused` of them have been answered 503; every answer, and the rows stored."""
    with httpx.Client(base_url=server.url, timeout=60) as http:
        tenant = make_tenant(sessions, http)
        model = create_model(tenant, engine)
    answers: list[httpx.Response] = []
    lock = threading.Lock()

    def post(items: list[dict[str, Any]]) -> None:
        with httpx.Client(base_url=server.url, timeout=60) as c:
            r = c.post(
                f"/v1/models/{model.name}/predictions",
                json={"predictions": items},
                headers=tenant.headers("ingest"),
            )
        with lock:
            answers.append(r)

    threads = [threading.Thread(target=post, args=(items,)) for items in bodies]
    with _hour_held(engine, model.id, epoch_hour(HELD)):
        for t in threads:
            t.start()
        wait_until(
            lambda: sum(r.status_code == 503 for r in answers) >= refused,
            60,
            what="the writes the store cannot take yet to be refused",
        )
    for t in threads:
        t.join(60)
    for r in answers:
        if r.status_code == 503:
            assert r.headers["retry-after"] == "1"
            assert r.headers["content-type"].startswith("application/problem+json")
            assert "not keeping up" in r.json()["detail"]
    return answers, count(engine, "predictions", model.id)


HELD = datetime.now(UTC).replace(minute=5, second=0, microsecond=0) - timedelta(hours=3)


def _rows(prefix: str, n: int) -> list[dict[str, Any]]:
    return [{"id": f"{prefix}-{j}", "ts": HELD.isoformat(), "score": 0.7} for j in range(n)]


def test_a_held_up_store_answers_503_with_retry_after_and_stores_nothing_refused(
    pg_store: tuple[str, Engine, Any],
) -> None:
    url, engine, sessions = pg_store
    app = create_app(Settings(database_url=url, jobs=False), engine=engine, jobs=False)
    app.app.state.group_writer = GroupWriter(app.app.state.sessions, threads=1, max_queued=2)
    with LiveServer(app) as server:
        # one batch waits at the hour's hold, two in the queue: the other five are refused
        answers, stored = _post_while_held(
            server, engine, sessions, [_rows(f"sofa-{i}", 1) for i in range(8)], refused=5
        )
    assert sorted(r.status_code for r in answers) == [200] * 3 + [503] * 5
    assert all(
        r.json() == {"accepted": 1, "duplicates": 0} for r in answers if r.status_code == 200
    )
    assert stored == 3


def test_large_batches_past_the_limit_in_flight_get_503_and_store_nothing(
    pg_store: tuple[str, Engine, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    from belated.api import deps

    monkeypatch.setattr(deps, "MAX_WRITES_IN_FLIGHT", 2)
    url, engine, sessions = pg_store
    app = create_app(Settings(database_url=url, jobs=False), engine=engine, jobs=False)
    with LiveServer(app) as server:
        answers, stored = _post_while_held(
            server, engine, sessions, [_rows(f"table-{i}", 250) for i in range(6)], refused=4
        )
    assert sorted(r.status_code for r in answers) == [200, 200, 503, 503, 503, 503]
    assert stored == 2 * 250

"""Two real service processes on one PostgreSQL database: one leader, each bucket refreshed
once, and the survivor takes over within TAKEOVER_SECONDS when the leader is killed.

Refreshes are counted by a trigger on `rollups` that this test adds to its own throwaway
database: every rollup row a refresh writes leaves a row in `refresh_audit`.
"""

from __future__ import annotations

import os
import signal
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import Engine, text

from belated.jobs.leader import LEADER_LOCK
from belated.store import keys
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import upgrade
from tests.conftest import (
    REPO,
    STORES,
    create_pg_database,
    drop_pg_database,
    free_port,
    pg_url,
)
from tests.support import base_time, label, outcome_of, predictions, wait_until

pytestmark = [
    pytest.mark.pg,
    pytest.mark.skipif("postgresql" not in STORES, reason="needs PostgreSQL"),
]
TAKEOVER_SECONDS = 15.0  # leader poll every 2 s and a tick every 0.5 s; generous on 2 cores
AUDIT = """
CREATE TABLE refresh_audit (level text, start integer, seg_key text);
CREATE FUNCTION audit_rollup() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN INSERT INTO refresh_audit VALUES (NEW.level, NEW.start, NEW.seg_key); RETURN NEW; END $$;
CREATE TRIGGER audit_rollup AFTER INSERT ON rollups FOR EACH ROW EXECUTE FUNCTION audit_rollup();
"""


@pytest.fixture()
def database() -> Iterator[tuple[str, Engine, str]]:
    """A fresh migrated database with the audit trigger and a token of every scope."""
    name = create_pg_database("belated_leaders")
    url = pg_url(name)
    engine = make_engine(url)
    try:
        upgrade(url)
        with engine.begin() as conn:
            conn.exec_driver_sql(AUDIT)
        with transaction(make_sessionmaker(engine)) as session:
            project = keys.get_or_create_project(session=session, name="shop")
            _, token = keys.create(
                session=session, project_id=project.id, scopes=["admin", "ingest", "read"]
            )
        yield url, engine, token
    finally:
        engine.dispose()
        drop_pg_database(name)


class Service:
    """`belated serve` in a process of its own."""

    def __init__(self, url: str, workdir: Path, name: str) -> None:
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        env = {
            **os.environ,
            "BELATED_DATABASE_URL": url,
            "BELATED_REFRESH_SECONDS": "0.5",
            "BELATED_JOBS": "true",
            "BELATED_HOST": "127.0.0.1",
        }
        self.log = open(workdir / f"{name}.log", "w")  # noqa: SIM115 (closed in stop)
        self.proc = subprocess.Popen(
            [str(REPO / ".venv/bin/belated"), "serve", "--port", str(self.port)],
            env=env,
            cwd=workdir,
            stdout=self.log,
            stderr=subprocess.STDOUT,
        )

    def health(self) -> dict[str, Any] | None:
        """GET /healthz, or None while the process does not answer."""
        try:
            return httpx.get(f"{self.base}/healthz", timeout=5).json()
        except httpx.HTTPError:
            return None

    def stop(self) -> None:
        """Terminate (then kill) the process."""
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
        self.log.close()


def leaders(services: list[Service]) -> list[bool]:
    """Which services say they hold the jobs lock."""
    return [bool((s.health() or {}).get("jobs", {}).get("leader")) for s in services]


def scalar(engine: Engine, sql: str, **params: Any) -> Any:
    """One value from SQL."""
    with engine.connect() as conn:
        return conn.execute(text(sql), params).scalar_one()


def refreshes_per_hour(engine: Engine) -> dict[int, int]:
    """How many times each hour's whole-model rollup was written."""
    with engine.connect() as conn:
        found = conn.execute(
            text(
                "SELECT start, count(*) FROM refresh_audit"
                " WHERE level = 'h' AND seg_key = '' GROUP BY start"
            )
        )
        return {int(h): int(n) for h, n in found}


def post(service: Service, token: str, path: str, body: dict[str, Any]) -> dict[str, Any]:
    """POST with the token; must be a 2xx."""
    r = httpx.post(
        f"{service.base}{path}", json=body, timeout=30, headers={"Authorization": f"Bearer {token}"}
    )
    assert r.is_success, r.text
    return r.json()


def rollups_match(engine: Engine) -> bool:
    """Every hour's rollup has the raw rows' prediction and label counts."""
    with engine.connect() as conn:
        raw = set(
            conn.execute(
                text("SELECT hour, count(*), count(actual) FROM predictions GROUP BY hour")
            ).all()
        )
        rolled = set(
            conn.execute(
                text(
                    "SELECT start, n_pred, n_labelled FROM rollups"
                    " WHERE level = 'h' AND seg_key = ''"
                )
            ).all()
        )
    return bool(raw) and raw == rolled


def test_one_leader_refreshes_each_bucket_once_and_the_other_takes_over(
    database: tuple[str, Engine, str], tmp_path: Path
) -> None:
    url, engine, token = database
    services = [Service(url, tmp_path, "a"), Service(url, tmp_path, "b")]
    try:
        wait_until(lambda: all(s.health() for s in services), 60, what="both services answering")
        wait_until(lambda: sum(leaders(services)) == 1, 15, what="exactly one leader")
        for _ in range(10):  # and it stays that way
            assert sum(leaders(services)) == 1
            time.sleep(0.3)
        # one session-level lock on the leader's key; other advisory locks (a job's
        # transaction-level lock on partitions or buckets) may be held for a moment
        locks = (
            "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND granted"
            " AND database = (SELECT oid FROM pg_database WHERE datname = current_database())"
            f" AND classid = {LEADER_LOCK >> 32} AND objid = {LEADER_LOCK & 0xFFFFFFFF}"
            " AND objsubid = 1"
        )
        assert scalar(engine, locks) == 1
        leader, follower = services if leaders(services)[0] else services[::-1]

        post(follower, token, "/v1/models", {"name": "returns-v2"})
        items = predictions(300, base=base_time())  # five hours, one a minute
        post(follower, token, "/v1/models/returns-v2/predictions", {"predictions": items})
        dirty = "SELECT count(*) FROM dirty_buckets"
        wait_until(lambda: scalar(engine, dirty) == 0, 20, what="no dirty bucket")
        hours = refreshes_per_hour(engine)
        assert len(hours) >= 5 and set(hours.values()) == {1}  # each bucket once
        labels = [label(p["id"], outcome_of(n)) for n, p in enumerate(items) if n < 120]
        post(leader, token, "/v1/models/returns-v2/labels", {"labels": labels})
        wait_until(lambda: scalar(engine, dirty) == 0, 20, what="no dirty bucket")
        wait_until(lambda: rollups_match(engine), 10, what="rollups matching the raw rows")
        again = refreshes_per_hour(engine)
        touched = {
            int(h)
            for h in scalar_list(
                engine, "SELECT DISTINCT hour FROM predictions WHERE actual IS NOT NULL"
            )
        }
        assert again == {h: 2 if h in touched else 1 for h in hours}

        leader.proc.send_signal(signal.SIGKILL)
        leader.proc.wait(timeout=10)
        wait_until(
            lambda: leaders([follower]) == [True], TAKEOVER_SECONDS, what="the follower's takeover"
        )
        wait_until(lambda: scalar(engine, locks) == 1, 5, what="one advisory lock")

        more = predictions(120, start=300, base=base_time())
        post(follower, token, "/v1/models/returns-v2/predictions", {"predictions": more})
        wait_until(lambda: scalar(engine, dirty) == 0, 20, what="no dirty bucket")
        wait_until(lambda: rollups_match(engine), 10, what="rollups matching the raw rows")
        latest = refreshes_per_hour(engine)
        new_hours = set(latest) - set(again)
        assert new_hours and all(latest[h] == 1 for h in new_hours)
    finally:
        for s in services:
            s.stop()


def scalar_list(engine: Engine, sql: str) -> list[Any]:
    """The first column of a query."""
    with engine.connect() as conn:
        return list(conn.execute(text(sql)).scalars())

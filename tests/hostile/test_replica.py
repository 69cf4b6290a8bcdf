"""`belated serve --read-only` on a real streaming hot standby (SQLite: its neighbour
test_read_only_sqlite.py).

A private primary cluster and its `pg_basebackup -R` standby (tests/hostile/replica.py):
the primary is migrated and served with its jobs on; the standby is served read-only. What
the primary takes and refreshes shows on the replica within a bounded poll; the replica
says how stale it is, refuses every write with 405 while the primary's tables keep their
rows, and neither the replica's log nor the standby server's log holds an error of a write
attempted (a hot standby answers "cannot execute ... in a read-only transaction").
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import psycopg
import pytest

from belated.store.db import make_engine, make_sessionmaker
from belated.store.migrate import upgrade
from belated.store.tables import Base
from tests.conftest import Tenant, make_tenant
from tests.hostile.pgcluster import ServiceProcess
from tests.hostile.replica import Pair
from tests.support import label, outcome_of, predictions, unique_name, wait_until

pytestmark = pytest.mark.slow

# the primary's jobs refresh every second and the standby replays within a moment on
# loopback; 30 seconds leaves room for a busy machine
VISIBLE_SECONDS = 30.0
N_PRED, N_LABELS = 48, 24


@dataclass
class Served:
    """The two clusters, the primary's service and the replica's, and a tenant."""

    pair: Pair
    primary: ServiceProcess
    replica: ServiceProcess
    primary_dsn: str
    tenant: Tenant


def _at_head(dsn: str, head: str) -> bool:
    try:
        with psycopg.connect(dsn, connect_timeout=2) as conn:
            # asked without an error: the standby's log is checked for ERROR lines later,
            # and a poll that runs before the migration is replayed must not leave one
            if conn.execute("SELECT to_regclass('alembic_version')").fetchone() == (None,):
                return False
            row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
    except psycopg.Error:
        return False
    return bool(row and row[0] == head)


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    """A primary served with jobs, its standby served with --read-only --database-url."""
    logs = tmp_path_factory.mktemp("replica")
    with Pair() as pair:
        assert pair.standby is not None and pair.standby.in_recovery()
        url = pair.primary.create_database("belated")
        upgrade(url)
        with psycopg.connect(pair.primary.dsn("belated")) as conn:
            row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
        assert row is not None
        standby_url = pair.standby.url("belated")
        wait_until(
            lambda: _at_head(pair.standby.dsn("belated"), row[0]),  # type: ignore[union-attr]
            VISIBLE_SECONDS,
            what="the migrated database replayed on the standby",
        )
        engine = make_engine(url)
        with (
            ServiceProcess(url, logs / "primary.log", env={"BELATED_JOBS": "true"}) as primary,
            # the environment names the primary: --database-url must win
            ServiceProcess(
                url,
                logs / "replica.log",
                env={"BELATED_JOBS": "true"},
                args=("--read-only", "--database-url", standby_url),
            ) as replica,
            httpx.Client(base_url=primary.url, timeout=30) as pc,
        ):
            tenant = make_tenant(make_sessionmaker(engine), pc)
            engine.dispose()
            yield Served(pair, primary, replica, pair.primary.dsn("belated"), tenant)


def _feed(s: Served) -> str:
    c, name = s.tenant.client, unique_name()
    assert c.post("/v1/models", json={"name": name}).status_code == 201
    rows = predictions(N_PRED)
    assert c.post(f"/v1/models/{name}/predictions", json={"predictions": rows}).status_code == 200
    labels = [label(r["id"], outcome_of(n)) for n, r in enumerate(rows[:N_LABELS])]
    assert c.post(f"/v1/models/{name}/labels", json={"labels": labels}).status_code == 200
    return name


def _totals(answer: dict[str, Any]) -> tuple[int, int]:
    windows = answer.get("windows", [])
    return sum(w["predictions"] for w in windows), sum(w["labelled"] for w in windows)


def _row_counts(dsn: str) -> dict[str, int]:
    """Rows of every table on the primary, but service_state (the jobs rewrite it)."""
    with psycopg.connect(dsn) as conn:
        return {
            t.name: int(conn.execute(f'SELECT count(*) FROM "{t.name}"').fetchone()[0])  # type: ignore[index]
            for t in Base.metadata.sorted_tables
            if t.name != "service_state"
        }


def _settled_counts(s: Served) -> dict[str, int]:
    """The primary's row counts once its jobs have folded every write the tests made: the
    refresh empties dirty_buckets and label_changes and writes rollups, which a count taken
    earlier would see change under a replica that wrote nothing."""
    wait_until(
        lambda: all(_row_counts(s.primary_dsn)[t] == 0 for t in ("dirty_buckets", "label_changes")),
        VISIBLE_SECONDS,
        what="the primary's jobs refreshed the writes",
    )
    return _row_counts(s.primary_dsn)


def test_the_replica_shows_the_primarys_refreshed_writes_and_says_how_stale(
    served: Served,
) -> None:
    name = _feed(served)
    headers = {"Authorization": served.tenant.client.headers["Authorization"]}
    with httpx.Client(base_url=served.replica.url, timeout=30, headers=headers) as rc:
        path = f"/v1/models/{name}/metrics?granularity=day"
        wait_until(
            lambda: (
                rc.get(path).status_code == 200
                and _totals(rc.get(path).json()) == (N_PRED, N_LABELS)
            ),
            VISIBLE_SECONDS,
            what=lambda: f"the writes on the replica: {rc.get(path).text[:300]}",
        )
        mine = [
            (w["start"], w["predictions"], w["labelled"]) for w in rc.get(path).json()["windows"]
        ]
        theirs = served.tenant.client.get(path).json()["windows"]
        assert mine == [(w["start"], w["predictions"], w["labelled"]) for w in theirs]
        r = rc.get(path)
        stale = float(r.headers["x-belated-staleness"])
        health = rc.get("/healthz").json()
        assert health["read_only"] is True and health["standby"] is True
        assert health["store"] == "up" and health["jobs"] == {"enabled": False, "leader": False}
        # the primary refreshes every second: the replica's answers are seconds old
        assert 0 <= stale < VISIBLE_SECONDS
        assert 0 <= health["staleness_seconds"] < VISIBLE_SECONDS
        # the record of the refresh was replayed after its start: staleness covers the lag
        lag = health["replay_lag_seconds"]
        assert lag is not None and health["staleness_seconds"] >= lag - 0.01
        scrape = rc.get("/metrics").text
        assert "belated_read_only 1.0" in scrape
        assert "belated_staleness_seconds " in scrape
        assert "belated_replay_lag_seconds " in scrape
        primary_health = served.tenant.client.get("/healthz").json()
        assert primary_health["read_only"] is False and primary_health["jobs"]["leader"] is True


WRITES = [
    ("POST", "/v1/models", {"name": "chairs"}),
    ("POST", "/v1/models/{m}/predictions", {"predictions": predictions(2, prefix="late")}),
    ("POST", "/v1/models/{m}/labels", {"labels": [label("order-30", "1")]}),
    ("PATCH", "/v1/models/{m}", {"threshold": 0.3}),
    ("PUT", "/v1/models/{m}/rollups", None),
    ("DELETE", "/v1/models/{m}", None),
    ("DELETE", "/v1/models/{m}/predictions", {"ids": ["order-1"]}),
    ("POST", "/v1/keys", {"scopes": ["read"]}),
]


def test_writes_on_the_replica_are_405_and_nothing_is_written(served: Served) -> None:
    name = _feed(served)
    before = _settled_counts(served)
    headers = {"Authorization": served.tenant.client.headers["Authorization"]}
    with httpx.Client(base_url=served.replica.url, timeout=30, headers=headers) as rc:
        for method, path, body in WRITES:
            r = rc.request(method, path.format(m=name), json=body)
            assert r.status_code == 405, (method, path, r.text)
            assert r.headers["allow"] == "GET, HEAD"
            assert r.headers["content-type"] == "application/problem+json"
            assert r.json()["status"] == 405 and "read-only" in r.json()["detail"]
        assert rc.get(f"/v1/models/{name}").status_code == 200
    assert _row_counts(served.primary_dsn) == before
    got = served.tenant.client.get(f"/v1/models/{name}").json()
    assert got["threshold"] != 0.3 and got["counts"]["predictions"] == N_PRED


def test_the_replica_never_tries_a_write(served: Served) -> None:
    """Reads of every kind, then both logs: no read-only-transaction or recovery error."""
    name = _feed(served)
    headers = {"Authorization": served.tenant.client.headers["Authorization"]}
    cookies = {"belated_token": headers["Authorization"].removeprefix("Bearer ")}
    with httpx.Client(
        base_url=served.replica.url, timeout=30, headers=headers, cookies=cookies
    ) as rc:
        wait_until(
            lambda: rc.get(f"/v1/models/{name}").status_code == 200,
            VISIBLE_SECONDS,
            what="the model on the replica",
        )
        for path in (
            "/v1/models",
            f"/v1/models/{name}/metrics?granularity=hour",
            f"/v1/models/{name}/thresholds",
            f"/v1/models/{name}/delays",
            f"/v1/models/{name}/pending",
            f"/v1/models/{name}/rules",
            "/v1/alerts",
            "/v1/keys",
            "/",
            f"/models/{name}",
            "/metrics",
            "/healthz",
        ):
            r = rc.get(path)
            assert r.status_code == 200, (path, r.text[:300])
            assert "x-belated-staleness" in r.headers, path
    assert served.replica.alive()
    replica_log = served.replica.log.read_text().lower()
    for needle in ("read-only transaction", "recovery", "traceback"):
        assert needle not in replica_log, needle
    assert served.pair.standby is not None
    server_log = served.pair.standby.log.read_text()
    assert "read-only transaction" not in server_log
    assert "ERROR:" not in server_log, served.pair.standby.tail()


def test_several_read_only_processes_share_the_port(served: Served, tmp_path: Path) -> None:
    """`--workers 2 --read-only`: each process builds its app from the environment, which
    must carry the replica's address and the read-only mode."""
    assert served.pair.standby is not None
    standby_url = served.pair.standby.url("belated")
    headers = {"Authorization": served.tenant.client.headers["Authorization"]}
    before = _settled_counts(served)
    with (
        ServiceProcess(
            served.pair.primary.url("belated"),
            tmp_path / "workers.log",
            args=("--read-only", "--workers", "2", "--database-url", standby_url),
        ) as ro,
        httpx.Client(base_url=ro.url, timeout=30, headers=headers) as c,
    ):
        for _ in range(6):  # connections land on either process
            with httpx.Client(base_url=ro.url, timeout=30, headers=headers) as one:
                health = one.get("/healthz").json()
                assert health["read_only"] is True and health["standby"] is True
                r = one.post("/v1/models", json={"name": "stools"})
                assert r.status_code == 405 and r.headers["allow"] == "GET, HEAD"
        assert c.get("/v1/models").status_code == 200
    assert _row_counts(served.primary_dsn) == before
    log = (tmp_path / "workers.log").read_text().lower()
    assert "read-only transaction" not in log and "traceback" not in log

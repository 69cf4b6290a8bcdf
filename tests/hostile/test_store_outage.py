"""The store goes away under a running service and comes back.

A private PostgreSQL cluster (never the shared server) is started, migrated and served by
`belated serve` with its jobs on. While the cluster is stopped, every request that needs the
store is answered 503 with problem details and Retry-After, and /healthz reports the store
down; when it is started again the same process recovers by itself, without a restart,
within RECOVERY_SECONDS.
"""

from __future__ import annotations

import re
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from belated.store.db import make_engine, make_sessionmaker
from belated.store.migrate import upgrade
from tests.conftest import Tenant, make_tenant
from tests.hostile.pgcluster import PrivateCluster, ServiceProcess, random_name
from tests.support import label, predictions, time_until, wait_until

# The pool checks a connection idle for a second before use and a refused connection fails at
# once, so recovery takes one request; the jobs' leader lock is retried every 2 seconds.
# 15 seconds leaves room for a slow machine.
RECOVERY_SECONDS = 15.0
pytestmark = pytest.mark.slow


@pytest.fixture()
def cluster() -> Iterator[PrivateCluster]:
    """A throw-away PostgreSQL cluster on a free loopback port."""
    with PrivateCluster() as c:
        yield c


@pytest.fixture()
def served(cluster: PrivateCluster, tmp_path: Path) -> Iterator[tuple[ServiceProcess, str]]:
    """`belated serve` with jobs on, over a migrated database of the private cluster."""
    url = cluster.create_database("belated")
    upgrade(url)
    with ServiceProcess(
        url, tmp_path / "service.log", env={"BELATED_JOBS": "true", "BELATED_LOG_FORMAT": "json"}
    ) as service:
        yield service, url


def _is_503_problem(r: httpx.Response) -> bool:
    return (
        r.status_code == 503
        and r.headers["content-type"].startswith("application/problem+json")
        and r.json()["status"] == 503
        and bool(r.json()["detail"])
        and float(r.headers["retry-after"]) > 0
    )


@pytest.mark.parametrize("mode", ["fast", "immediate"], ids=["clean-stop", "crash"])
def test_requests_get_503_while_the_store_is_down_and_recover_without_a_restart(
    cluster: PrivateCluster, served: tuple[ServiceProcess, str], mode: str
) -> None:
    """`fast` disconnects clients and shuts down cleanly; `immediate` stops without a
    shutdown checkpoint, as a crash would, and the next start recovers from the WAL."""
    service, url = served
    engine = make_engine(url)
    try:
        with httpx.Client(base_url=service.url, timeout=30) as c:
            tenant = make_tenant(make_sessionmaker(engine), c)
            engine.dispose()  # the test holds no connection to the cluster while it is down
            name = random_name("returns")
            _store_is_up(c, tenant, name, first=0)
            cluster.stop(mode)
            assert not cluster.running()
            _store_is_down(c, tenant, name)
            assert service.alive()
            cluster.start()
            _, took = time_until(
                lambda: c.get("/v1/models").status_code == 200,
                RECOVERY_SECONDS,
                step=0.2,
                what="requests answered after the cluster came back",
            )
            print(f"requests recovered {took:.2f} s after the cluster was back")
            _store_is_up(c, tenant, name, first=20)
            health = wait_until(
                lambda: _healthy(c), RECOVERY_SECONDS, step=0.2, what="a healthy service"
            )
            assert health["jobs"]["leader"] is True
            # the jobs run again: the buckets written after the outage are refreshed
            wait_until(
                lambda: c.get("/healthz").json()["dirty_buckets"] == 0,
                RECOVERY_SECONDS,
                step=0.2,
                what="no dirty bucket",
            )
            got = c.get(f"/v1/models/{name}").json()["counts"]
            assert got == {"predictions": 40, "labelled": 2, "pending_labels": 0}
            assert service.alive()
    finally:
        engine.dispose()


def _healthy(c: httpx.Client) -> dict[str, Any] | None:
    r = c.get("/healthz")
    body = r.json()
    return (
        body if r.status_code == 200 and body["store"] == "up" and body["jobs"]["leader"] else None
    )


def _store_is_up(c: httpx.Client, tenant: Tenant, name: str, first: int) -> None:
    """Writes and reads succeed."""
    if first == 0:
        assert c.post("/v1/models", json={"name": name}).status_code == 201
    items = predictions(20, start=first)
    r = c.post(
        f"/v1/models/{name}/predictions",
        json={"predictions": items},
        headers=tenant.headers("ingest"),
    )
    assert r.status_code == 200 and r.json()["accepted"] == 20, r.text
    r = c.post(
        f"/v1/models/{name}/labels",
        json={"labels": [label(items[0]["id"], "1")]},
        headers=tenant.headers("ingest"),
    )
    assert r.status_code == 200, r.text
    assert c.get(f"/v1/models/{name}/metrics").status_code == 200
    health = c.get("/healthz")
    assert health.status_code == 200 and health.json()["store"] == "up"


def _store_is_down(c: httpx.Client, tenant: Tenant, name: str) -> None:
    """Every kind of request needing the store is a 503 problem; /healthz says down."""
    calls = [
        ("GET", "/v1/models", None, tenant.headers("read")),
        ("GET", f"/v1/models/{name}", None, tenant.headers("read")),
        ("GET", f"/v1/models/{name}/metrics", None, tenant.headers("read")),
        (
            "POST",
            f"/v1/models/{name}/predictions",
            {"predictions": predictions(5, start=100)},
            tenant.headers("ingest"),
        ),
        (
            "POST",
            f"/v1/models/{name}/labels",
            {"labels": [label("order-1", "0")]},
            tenant.headers("ingest"),
        ),
        ("POST", "/v1/webhooks", {"url": "http://127.0.0.1:9/hook"}, tenant.headers("admin")),
        ("GET", "/v1/alerts", None, tenant.headers("read")),
        ("POST", "/v1/keys", {"scopes": ["read"]}, tenant.headers("admin")),
    ]
    for _ in range(2):  # the first round meets pooled connections, the second fresh ones
        for method, path, body, headers in calls:
            started = time.monotonic()
            r = c.request(method, path, json=body, headers=headers)
            assert _is_503_problem(r), (method, path, r.status_code, r.text)
            assert time.monotonic() - started < 10, (method, path)
    health = c.get("/healthz")
    assert health.status_code == 503, health.text
    assert health.json()["store"] == "down"
    # without a token, /metrics serves the service's own figures, which say the store is down
    scrape = httpx.get(str(c.base_url.join("/metrics")), timeout=30)
    assert scrape.status_code == 200, scrape.text
    assert re.search(r"^belated_store_up 0(\.0)?$", scrape.text, re.MULTILINE), scrape.text

"""Webhook delivery: outage and recovery, 410 disabling, ordering and deduplication."""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import numpy as np
from sqlalchemy import text

from belated.jobs import JobRunner
from tests.alerts.receiver import Receiver
from tests.conftest import Tenant
from tests.support.alert_days import DROP_RULE, START, feed, returns_model


def _ticks(runner: JobRunner, frozen: Any, n: int, step_seconds: float = 5.0) -> None:
    """Run the jobs n times, moving the service clock on so retries come due."""
    for _ in range(n):
        runner.tick()
        frozen.set(frozen.now() + timedelta(seconds=step_seconds))


def _two_alerts(tenant: Tenant, frozen: Any) -> None:
    """A drop in recall and a shift in the positive rate: two alerts, several events."""
    c = tenant.client
    returns_model(tenant.client)
    c.post("/v1/models/returns-v2/rules", json=DROP_RULE)
    c.post(
        "/v1/models/returns-v2/rules",
        json={"kind": "shift", "measure": "positive_rate", "threshold": 0.03, "alpha": 0.01},
    )
    rng = np.random.default_rng(11)
    feed(tenant.client, rng, 0, 9, recall=0.85)
    feed(tenant.client, rng, 9, 12, recall=0.45)
    frozen.set(START + timedelta(days=12, hours=12))


def test_outage_then_recovery_delivers_every_event_once_in_order(
    tenant: Tenant, frozen: Any, runner: JobRunner
) -> None:
    # the receiver is down (503 with Retry-After) for its first six calls
    with Receiver(lambda n: (503, {"Retry-After": "1"}) if n <= 6 else (200, {})) as rx:
        rx.secret = tenant.client.post("/v1/webhooks", json={"url": rx.url}).json()["secret"]
        _two_alerts(tenant, frozen)
        _ticks(runner, frozen, 12)
        frozen.set(START + timedelta(days=20, hours=12))  # baseline catches up: resolves
        _ticks(runner, frozen, 12)
        events = rx.unique()
        assert rx.calls > len(events)  # there were failed attempts
        assert rx.rejected == 0
    alerts = tenant.client.get("/v1/alerts").json()["items"]
    expected = sum(2 if a["state"] == "cleared" else 1 for a in alerts)
    assert len(alerts) >= 2 and len(events) == expected
    per_alert: dict[str, list[str]] = {}
    for e in events:
        per_alert.setdefault(e["data"]["id"], []).append(e["type"])
    for types in per_alert.values():
        assert types[0] == "alert.raised"
        assert types in (["alert.raised"], ["alert.raised", "alert.cleared"])


def test_a_410_disables_the_endpoint_and_says_so(
    tenant: Tenant, frozen: Any, runner: JobRunner, engine: Any
) -> None:
    with Receiver(lambda _n: (410, {})) as rx:
        hook = tenant.client.post("/v1/webhooks", json={"url": rx.url}).json()
        rx.secret = hook["secret"]
        _two_alerts(tenant, frozen)
        _ticks(runner, frozen, 3)
        assert rx.calls == 1  # after the 410 nothing more is sent
    log = tenant.client.get(f"/v1/webhooks/{hook['id']}/deliveries").json()["items"]
    assert log and all(d["state"] == "disabled" for d in log)
    assert any(d["last_status"] == 410 for d in log)
    listed = tenant.client.get("/v1/webhooks").json()["items"]
    assert listed[0]["disabled_at"] and "410" in listed[0]["disabled_reason"]
    with engine.connect() as conn:
        pending = conn.execute(
            text("SELECT count(*) FROM deliveries WHERE webhook_id = :w AND state = 'pending'"),
            {"w": hook["id"]},
        ).scalar()
    assert pending == 0


def test_webhook_urls_pointing_at_metadata_or_link_local_are_refused(
    tenant: Tenant, engine: Any
) -> None:
    c = tenant.client
    for url in (
        "http://169.254.169.254/latest/meta-data",
        "http://[fe80::1]/x",
        "ftp://example.invalid/x",
        "http://user:pw@127.0.0.1:9/x",
    ):
        r = c.post("/v1/webhooks", json={"url": url})
        assert r.status_code == 422, url
        assert r.json()["errors"][0]["field"] == "url"
    with engine.connect() as conn:
        n = conn.execute(
            text(
                "SELECT count(*) FROM webhooks w JOIN projects p ON p.id = w.project_id "
                "WHERE p.name = :p"
            ),
            {"p": tenant.name},
        ).scalar()
    assert n == 0

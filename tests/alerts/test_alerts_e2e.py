"""Alerts end to end through the scheduler, to a real receiver that verifies signatures."""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import numpy as np
from sqlalchemy import text

from belated.jobs import JobRunner
from tests.alerts.receiver import Receiver
from tests.conftest import Tenant
from tests.support.alert_days import DROP_RULE, START, feed, returns_model
from tests.support.polling import wait_until


def test_drop_opens_delivers_acknowledges_and_resolves(
    tenant: Tenant, frozen: Any, runner: JobRunner
) -> None:
    c = tenant.client
    rng = np.random.default_rng(7)
    returns_model(tenant.client)
    rule = c.post("/v1/models/returns-v2/rules", json=DROP_RULE).json()
    with Receiver() as rx:
        hook = c.post("/v1/webhooks", json={"url": rx.url}).json()
        rx.secret = hook["secret"]
        feed(tenant.client, rng, 0, 10, recall=0.85)
        feed(tenant.client, rng, 10, 13, recall=0.60)
        frozen.set(START + timedelta(days=13, hours=12))
        runner.start()  # the real scheduler runs refresh, evaluation and delivery
        assert rx.wait_for(1, timeout=60)
        opened = rx.unique()[0]
        assert opened["type"] == "alert.opened"
        alert = opened["data"]
        assert alert["rule_id"] == rule["id"] and alert["state"] == "open"
        first = min(b["window_start"] for b in alert["breaches"])
        assert first == "2026-11-11T00:00:00Z"  # the day recall fell
        assert all(b["p_value"] < 0.05 for b in alert["breaches"])
        listed = c.get("/v1/alerts", params={"state": "open"}).json()["items"]
        assert [a["id"] for a in listed] == [alert["id"]]
        acked = c.post(f"/v1/alerts/{alert['id']}/acknowledge").json()
        assert acked["state"] == "acknowledged" and acked["acknowledged_at"]
        # recall recovers; after clear_after clean settled windows the alert resolves
        frozen.set(START + timedelta(days=22, hours=12))
        feed(tenant.client, rng, 13, 22, recall=0.85)
        assert rx.wait_for(2, timeout=60)
        events = rx.unique()
        assert [e["type"] for e in events] == ["alert.opened", "alert.resolved"]
        assert events[1]["data"]["id"] == alert["id"]
        assert rx.rejected == 0
    got = c.get(f"/v1/alerts/{alert['id']}").json()
    assert got["state"] == "resolved" and got["resolved_at"]


def test_muted_rule_records_breaches_and_delivers_nothing(
    tenant: Tenant, frozen: Any, runner: JobRunner, engine: Any
) -> None:
    c = tenant.client
    rng = np.random.default_rng(8)
    returns_model(tenant.client)
    until = (START + timedelta(days=60)).isoformat()
    rule = c.post("/v1/models/returns-v2/rules", json={**DROP_RULE, "muted_until": until}).json()
    assert rule["muted"] is True
    with Receiver() as rx:
        rx.secret = c.post("/v1/webhooks", json={"url": rx.url}).json()["secret"]
        feed(tenant.client, rng, 0, 9, recall=0.85)
        feed(tenant.client, rng, 9, 12, recall=0.55)
        frozen.set(START + timedelta(days=12, hours=12))
        runner.start()
        wait_until(lambda: c.get("/v1/alerts").json()["items"], 60, what="an alert")
        runner.stop()
        assert rx.calls == 0
    with engine.connect() as conn:
        breaches = conn.execute(
            text("SELECT count(*) FROM rule_windows WHERE rule_id = :r AND breached"),
            {"r": rule["id"]},
        ).scalar()
        outbox = conn.execute(
            text(
                "SELECT count(*) FROM deliveries d JOIN webhooks w ON w.id = d.webhook_id "
                "JOIN projects p ON p.id = w.project_id WHERE p.name = :p"
            ),
            {"p": tenant.name},
        ).scalar()
    assert breaches >= 1 and outbox == 0


def test_young_window_with_low_coverage_never_fires_a_label_based_rule(
    tenant: Tenant, frozen: Any, runner: JobRunner
) -> None:
    c = tenant.client
    rng = np.random.default_rng(9)
    returns_model(tenant.client, label_delay_days=30)
    c.post("/v1/models/returns-v2/rules", json=DROP_RULE)
    c.post(
        "/v1/models/returns-v2/rules",
        json={"kind": "floor", "measure": "recall", "threshold": 0.8, "min_support": 10},
    )
    # every window is younger than the 30-day label delay and 40% labelled
    feed(tenant.client, rng, 0, 7, recall=0.85, label_share=0.4)
    feed(tenant.client, rng, 7, 12, recall=0.30, label_share=0.4)
    frozen.set(START + timedelta(days=12, hours=12))
    for _ in range(2):
        summary = runner.tick()
        assert summary is not None and summary["evaluate"]["failed"] == 0
    assert c.get("/v1/alerts").json()["items"] == []
    windows = c.get(
        "/v1/models/returns-v2/metrics", params={"start": START.isoformat(), "end": "2026-11-12"}
    ).json()["windows"]
    assert all(not w["settled"] for w in windows)
    assert all(0.3 < w["coverage"] < 0.5 for w in windows)

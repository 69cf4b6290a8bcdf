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


def test_drop_raises_delivers_takes_a_note_and_clears(
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
        raised = rx.unique()[0]
        assert raised["type"] == "alert.raised"
        alert = raised["data"]
        assert alert["rule_id"] == rule["id"] and alert["state"] == "raised"
        first = min(b["window_start"] for b in alert["breaches"])
        assert first == "2026-11-11T00:00:00Z"  # the day recall fell
        assert alert["started_at"] == first  # when the problem started, not when the job ran
        assert all(b["p_value"] < 0.05 for b in alert["breaches"])
        # the event explains itself
        assert (alert["kind"], alert["measure"]) == ("drop", "recall")
        base = alert["baseline"]
        assert (base["start"], base["end"]) == ("2026-11-04T00:00:00Z", "2026-11-11T00:00:00Z")
        assert base["frozen"] is True and 0.8 < base["value"] < 0.9
        assert alert["description"] == (
            f"Recall fell more than 0.02 under its baseline of {base['value']:.3f}".rstrip("0")
            + " (4–10 Nov), at α = 0.05."
        )
        assert alert["latest"]["value"] < 0.7 and alert["latest"]["low"] is not None
        assert alert["link"].startswith("/models/returns-v2?granularity=day&start=2026-10-28")
        page = c.get(alert["link"])
        assert page.status_code == 200, page.text[-1500:]
        listed = c.get("/v1/alerts", params={"state": "raised"}).json()["items"]
        assert [a["id"] for a in listed] == [alert["id"]]
        noted = c.post(f"/v1/alerts/{alert['id']}/note", json={"text": "checking the feed"})
        assert noted.status_code == 200, noted.text
        assert noted.json()["state"] == "noted" and noted.json()["noted_at"]
        assert noted.json()["notes"][0]["text"] == "checking the feed"
        assert rx.wait_for(2, timeout=60)
        # recall recovers; after clear_after recovered settled windows the alert clears
        # the recovered days land whole: no job run sees a day half sent (hold the runner).
        # Recall comes back to 0.90, clear of the frozen baseline (about 0.85) less the 0.02
        # tolerance: at 300 positives a day a day at 0.85 itself falls under 0.83 about one
        # time in six, and clearing needs `clear_after` recovered days in a row
        with runner._run_lock:
            frozen.set(START + timedelta(days=22, hours=12))
            feed(tenant.client, rng, 13, 22, recall=0.90)
        ok = rx.wait_for(3, timeout=120)
        assert ok, c.get(f"/v1/alerts/{alert['id']}").json()["latest"]
        events = rx.unique()
        assert [e["type"] for e in events] == ["alert.raised", "alert.noted", "alert.cleared"]
        assert events[2]["data"]["id"] == alert["id"]
        assert events[2]["data"]["notes"][0]["text"] == "checking the feed"
        assert events[1]["data"]["description"] == alert["description"]
        assert rx.rejected == 0
    got = c.get(f"/v1/alerts/{alert['id']}").json()
    assert got["state"] == "cleared" and got["cleared_at"]


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

"""Every rule kind, end to end through the running scheduler, on both stores: traffic, stall
(coverage and silence), shift on score PSI and tag PSI, floor, and implied measures."""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import numpy as np

from belated.jobs import JobRunner
from tests.conftest import Tenant
from tests.support.alert_days import START, day_rows
from tests.support.polling import wait_until
from tests.support.sending import send_both


def test_every_rule_kind_fires_through_the_scheduler(
    tenant: Tenant, frozen: Any, runner: JobRunner
) -> None:
    c = tenant.client
    assert (
        c.post(
            "/v1/models",
            json={"name": "returns-v2", "label_delay_days": 3, "segment_keys": ["region"]},
        ).status_code
        == 201
    )
    rules = {
        "traffic": {"kind": "traffic", "low": 500},
        "stall": {"kind": "stall", "threshold": 0.5},
        "silence": {"kind": "stall", "max_silence_hours": 24},
        "psi": {"kind": "shift", "measure": "score_psi", "threshold": 0.25},
        "tag": {"kind": "shift", "measure": "tag_psi:region", "threshold": 0.25},
        "floor": {"kind": "floor", "measure": "precision", "threshold": 0.9, "min_support": 20},
        "implied": {"kind": "floor", "measure": "implied.precision", "threshold": 0.99},
    }
    ids = {}
    for name, body in rules.items():
        r = c.post("/v1/models/returns-v2/rules", json=body)
        assert r.status_code == 201, r.text
        ids[r.json()["id"]] = name
    rng = np.random.default_rng(12)
    for d in range(14):
        day = START + timedelta(days=d)
        # days 0-9: 800 orders from the south, labelled; from day 10 only 300 orders, from
        # the north, scored differently, and labels stop arriving
        if d < 10:
            preds, labels = day_rows(
                rng, day, positives=200, negatives=600, recall=0.8, prefix="o", region="south"
            )
        else:
            preds, labels = day_rows(
                rng,
                day,
                positives=150,
                negatives=150,
                recall=0.95,
                prefix="o",
                region="north",
                label_share=0.0,
            )
        send_both(c, "returns-v2", preds, labels)
    # the last label arrived at the fixture's time (day 14.5); two days later it is silent
    frozen.set(START + timedelta(days=16, hours=12))
    runner.start()

    def missing() -> set[str]:
        items = c.get("/v1/alerts", params={"limit": 100}).json()["items"]
        return set(rules) - {ids[a["rule_id"]] for a in items}

    wait_until(lambda: not missing(), 120, step=0.3, what=lambda: f"missing: {missing()}")
    runner.stop()
    items = c.get("/v1/alerts", params={"limit": 100}).json()["items"]
    by_kind = {ids[a["rule_id"]]: a for a in items}
    traffic_windows = {b["window_start"][:10] for b in by_kind["traffic"]["breaches"]}
    assert "2026-11-11" in traffic_windows  # day 10, the first thin day
    assert min(b["value"] for b in by_kind["psi"]["breaches"]) >= 0.25
    assert by_kind["silence"]["breaches"][0]["value"] > 24  # hours since the last label

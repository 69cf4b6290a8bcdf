"""The scheduled refresh: a JobRunner on the test store empties the dirty buckets, and a
failing step neither stops the steps after it nor the schedule.

Rollups are checked against plain SQL counts over the raw prediction rows.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

from sqlalchemy import Engine

from belated.config import Settings
from belated.jobs import JobRunner, refresh_step
from tests.conftest import Tenant
from tests.support import count, create_model, label, outcome_of, predictions, rows

WAIT_SECONDS = 30


def wait_for(condition: Callable[[], bool], seconds: float = WAIT_SECONDS) -> bool:
    """Poll until the condition holds; False when it never did."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.1)
    return condition()


def ingest_some(tenant: Tenant, model: str) -> list[dict[str, Any]]:
    """240 predictions over four hours (one a minute), two thirds of them labelled."""
    items = predictions(240)
    r = tenant.client.post(f"/v1/models/{model}/predictions", json={"predictions": items})
    assert r.status_code == 200, r.text
    labels = [label(p["id"], outcome_of(n)) for n, p in enumerate(items) if n % 3]
    r = tenant.client.post(f"/v1/models/{model}/labels", json={"labels": labels})
    assert r.status_code == 200, r.text
    return items


def assert_rollups_match_raw_rows(engine: Engine, model_id: int) -> None:
    """Every hour's whole-model rollup equals counts over its raw rows."""
    raw = {
        r[0]: tuple(r[1:])
        for r in rows(
            engine,
            """
        SELECT hour, count(*), count(actual),
          sum(CASE WHEN predicted = '1' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '1' AND actual = '0' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '0' THEN 1 ELSE 0 END)
        FROM predictions WHERE model_id = :m GROUP BY hour""",
            m=model_id,
        )
    }
    rolled = {
        r[0]: tuple(r[1:])
        for r in rows(
            engine,
            """
        SELECT start, n_pred, n_labelled, tp, fp, fn, tn FROM rollups
        WHERE model_id = :m AND level = 'h' AND seg_key = ''""",
            m=model_id,
        )
    }
    assert raw and rolled == raw


def test_the_scheduled_refresh_empties_the_dirty_buckets(
    tenant: Tenant, engine: Engine, store_url: str
) -> None:
    model = create_model(tenant, engine)
    ingest_some(tenant, model.name)
    assert count(engine, "dirty_buckets", model.id) > 0
    runner = JobRunner(
        engine=engine, settings=Settings(database_url=store_url, refresh_seconds=0.5)
    )
    runner.start()
    try:
        assert wait_for(lambda: count(engine, "dirty_buckets", model.id) == 0)
        assert runner.is_leader()
    finally:
        runner.stop()
    assert_rollups_match_raw_rows(engine, model.id)
    assert runner.runs >= 1 and "error" not in runner.last["refresh"]
    state = rows(engine, "SELECT value FROM service_state WHERE key = 'last_refresh'")
    assert len(state) == 1


def test_a_failing_step_stops_neither_the_others_nor_the_schedule(
    tenant: Tenant, engine: Engine, store_url: str
) -> None:
    model = create_model(tenant, engine)
    calls = {"broken": 0, "after": 0}

    def broken(_: Any) -> dict[str, Any]:
        calls["broken"] += 1
        raise RuntimeError("this step fails on purpose")

    def after(_: Any) -> dict[str, Any]:
        calls["after"] += 1
        return {"ok": True}

    runner = JobRunner(
        engine=engine,
        settings=Settings(database_url=store_url, refresh_seconds=0.5),
        steps=[("broken", broken), ("refresh", refresh_step), ("after", after)],
    )
    runner.start()
    try:
        assert wait_for(lambda: calls["broken"] >= 2 and calls["after"] >= 2)
        # data written while the schedule runs is still refreshed
        ingest_some(tenant, model.name)
        assert wait_for(lambda: count(engine, "dirty_buckets", model.id) == 0)
        assert wait_for(lambda: calls["broken"] >= 4)
        assert runner.scheduler.get_job("belated.refresh") is not None
    finally:
        runner.stop()
    assert runner.last["broken"]["error"] is True
    assert runner.last["after"]["ok"] is True
    assert calls["after"] >= 3
    assert_rollups_match_raw_rows(engine, model.id)
